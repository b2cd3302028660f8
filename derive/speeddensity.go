package derive

import (
	"errors"
	"fmt"
	"math"
)

// Constants of dry air.
const (
	// RAir is the specific gas constant of dry air, J/(kg·K): R*/M0 =
	// 8314.32/28.9644 (ISO 2533).
	RAir = 287.05
	// Gamma is the ratio of specific heats of dry air near 300 K (NBS
	// Circular 564).
	Gamma = 1.4
	// CpAir is the specific heat of dry air at constant pressure near 300 K,
	// J/(kg·K) (NBS Circular 564).
	CpAir = 1005.0
	// ZeroCelsius is 0 °C in kelvin.
	ZeroCelsius = 273.15
	// StdPressure and StdTemperature are the ISO 2533 sea-level conditions.
	StdPressure    = 101325.0
	StdTemperature = 288.15
)

// AirDensity returns the density of dry air in kg/m³ at pressure p (Pa) and
// temperature tC (°C), by the ideal-gas law ρ = p/(R·T).
func AirDensity(p, tC float64) float64 {
	return p / (RAir * (tC + ZeroCelsius))
}

// SpeedDensity returns the air mass flow in kg/s of a four-stroke engine by
// the speed-density method: ṁ = η_v · ρ · V_d · N/2, with ρ the manifold air
// density from MAP (Pa) and IAT (°C), V_d the displacement (m³), N the
// engine speed in rev/s (rpm/60) and two revolutions per cycle (the
// volumetric efficiency definition of Heywood, eq. 2.27).
func SpeedDensity(mapPa, iatC, rpm, displacement, ve float64) float64 {
	if rpm <= 0 {
		return 0
	}
	return ve * AirDensity(mapPa, iatC) * displacement * (rpm / 60) / 2
}

// Boost returns manifold gauge pressure: MAP less barometric pressure (Pa).
func Boost(mapPa, baroPa float64) float64 { return mapPa - baroPa }

// PressureRatio returns outlet over inlet absolute pressure, NaN for a
// non-positive inlet.
func PressureRatio(outlet, inlet float64) float64 {
	if inlet <= 0 {
		return math.NaN()
	}
	return outlet / inlet
}

// VETable is volumetric efficiency over engine speed (rows, rpm) and
// manifold pressure (columns, Pa), interpolated bilinearly and held at the
// edges.
type VETable struct {
	Speeds    []float64   // engine speed axis, rpm, strictly increasing
	Pressures []float64   // manifold pressure axis, Pa, strictly increasing
	Values    [][]float64 // Values[i][j] at Speeds[i], Pressures[j]
}

// Validate checks that the axes increase strictly and the values fit them.
func (t *VETable) Validate() error {
	if err := increasing("engine speed", t.Speeds); err != nil {
		return err
	}
	if err := increasing("manifold pressure", t.Pressures); err != nil {
		return err
	}
	if len(t.Values) != len(t.Speeds) {
		return fmt.Errorf("ve table: %d rows for %d engine speeds", len(t.Values), len(t.Speeds))
	}
	for i, row := range t.Values {
		if len(row) != len(t.Pressures) {
			return fmt.Errorf("ve table: row %d has %d values for %d pressures", i, len(row), len(t.Pressures))
		}
		for j, v := range row {
			if !(v > 0) || v > 2 {
				return fmt.Errorf("ve table: value %g at row %d column %d outside (0, 2]", v, i, j)
			}
		}
	}
	return nil
}

func increasing(name string, axis []float64) error {
	if len(axis) < 2 {
		return errors.New("ve table: the " + name + " axis needs at least two points")
	}
	for i := 1; i < len(axis); i++ {
		if !(axis[i] > axis[i-1]) {
			return fmt.Errorf("ve table: the %s axis does not increase at point %d (%g)", name, i, axis[i])
		}
	}
	return nil
}

// At returns the interpolated volumetric efficiency at rpm and MAP (Pa).
// A table that fails Validate's shape checks gives NaN.
func (t *VETable) At(rpm, mapPa float64) float64 {
	if len(t.Speeds) < 2 || len(t.Pressures) < 2 || len(t.Values) != len(t.Speeds) {
		return math.NaN()
	}
	i, fi := bracket(t.Speeds, rpm)
	j, fj := bracket(t.Pressures, mapPa)
	if len(t.Values[i]) != len(t.Pressures) || len(t.Values[i+1]) != len(t.Pressures) {
		return math.NaN()
	}
	v00, v01 := t.Values[i][j], t.Values[i][j+1]
	v10, v11 := t.Values[i+1][j], t.Values[i+1][j+1]
	return (v00*(1-fj)+v01*fj)*(1-fi) + (v10*(1-fj)+v11*fj)*fi
}

// bracket finds i with axis[i] ≤ x ≤ axis[i+1] and the fraction of the way,
// clamped to [0, 1] outside the axis.
func bracket(axis []float64, x float64) (int, float64) {
	n := len(axis)
	if x <= axis[0] {
		return 0, 0
	}
	if x >= axis[n-1] {
		return n - 2, 1
	}
	lo, hi := 0, n-1
	for hi-lo > 1 {
		m := (lo + hi) / 2
		if axis[m] <= x {
			lo = m
		} else {
			hi = m
		}
	}
	return lo, (x - axis[lo]) / (axis[hi] - axis[lo])
}
