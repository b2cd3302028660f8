package derive

import (
	"fmt"
	"io"
	"math"
	"strconv"
)

// MeasuredVE is the live volumetric efficiency estimate when a measured air
// mass flow exists: the measured flow over the speed-density flow at VE = 1.
func MeasuredVE(measuredKgPerS, mapPa, iatC, rpm, displacement float64) float64 {
	ideal := SpeedDensity(mapPa, iatC, rpm, displacement, 1)
	if !(ideal > 0) {
		return math.NaN()
	}
	return measuredKgPerS / ideal
}

// VEAccumulator gathers live VE estimates into the cells of an engine-speed
// × MAP grid (nearest grid point), so that the mean per cell can refine a
// configured table. Not safe for concurrent use.
type VEAccumulator struct {
	Speeds, Pressures []float64
	sum               [][]float64
	n                 [][]int
}

// NewVEAccumulator returns an accumulator over the axes (which must increase).
func NewVEAccumulator(speeds, pressures []float64) (*VEAccumulator, error) {
	if err := increasing("engine speed", speeds); err != nil {
		return nil, err
	}
	if err := increasing("manifold pressure", pressures); err != nil {
		return nil, err
	}
	a := &VEAccumulator{Speeds: speeds, Pressures: pressures}
	for range speeds {
		a.sum = append(a.sum, make([]float64, len(pressures)))
		a.n = append(a.n, make([]int, len(pressures)))
	}
	return a, nil
}

func nearest(axis []float64, x float64) int {
	i, f := bracket(axis, x)
	if f > 0.5 {
		return i + 1
	}
	return i
}

// Add records one estimate. Non-finite or implausible (≤ 0 or > 2) values
// are ignored.
func (a *VEAccumulator) Add(rpm, mapPa, ve float64) {
	if !(ve > 0 && ve <= 2) {
		return
	}
	i, j := nearest(a.Speeds, rpm), nearest(a.Pressures, mapPa)
	a.sum[i][j] += ve
	a.n[i][j]++
}

// Mean returns the mean estimate of a cell and its sample count.
func (a *VEAccumulator) Mean(i, j int) (float64, int) {
	if a.n[i][j] == 0 {
		return math.NaN(), 0
	}
	return a.sum[i][j] / float64(a.n[i][j]), a.n[i][j]
}

// WriteCSV writes the table of means: a header row of MAP in kPa, then one
// row per engine speed; empty cells are left blank.
func (a *VEAccumulator) WriteCSV(w io.Writer) error {
	line := []byte("engine_speed_rpm\\manifold_pressure_kpa")
	for _, p := range a.Pressures {
		line = append(line, ',')
		line = strconv.AppendFloat(line, p/1000, 'f', -1, 64)
	}
	line = append(line, '\n')
	for i, s := range a.Speeds {
		line = strconv.AppendFloat(line, s, 'f', -1, 64)
		for j := range a.Pressures {
			line = append(line, ',')
			if m, n := a.Mean(i, j); n > 0 {
				line = strconv.AppendFloat(line, m, 'f', 4, 64)
			}
		}
		line = append(line, '\n')
	}
	if _, err := w.Write(line); err != nil {
		return fmt.Errorf("ve table csv: %w", err)
	}
	return nil
}
