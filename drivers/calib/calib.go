// Package calib turns raw analog readings (millivolts or ADC counts) into
// physical values in canonical units: a straight line through two points, an
// interpolated table, or an NTC thermistor by its Beta or by Steinhart–Hart
// read through a divider. Readings outside the fault rails are open or short
// circuits and become sensor faults.
package calib

import (
	"errors"
	"fmt"
	"math"

	"github.com/plenum-engine/plenum/pipeline"
)

// Curve maps millivolts to a physical value.
type Curve interface {
	Apply(mv float64) float64
}

// Linear is a straight line through (MV0, Out0) and (MV1, Out1).
type Linear struct {
	MV0, Out0, MV1, Out1 float64
}

// Apply evaluates the line at mv.
func (l Linear) Apply(mv float64) float64 {
	return l.Out0 + (mv-l.MV0)*(l.Out1-l.Out0)/(l.MV1-l.MV0)
}

// Table interpolates linearly between points with strictly increasing MV,
// holding the end values outside the table.
type Table struct {
	MV, Out []float64
}

// NewTable checks and returns a table.
func NewTable(mv, out []float64) (Table, error) {
	if len(mv) < 2 || len(mv) != len(out) {
		return Table{}, fmt.Errorf("calib: table needs at least two points and one output per point (%d, %d)", len(mv), len(out))
	}
	if !finite(mv...) || !finite(out...) {
		return Table{}, fmt.Errorf("calib: table has a non-finite point")
	}
	for i := 1; i < len(mv); i++ {
		if !(mv[i] > mv[i-1]) {
			return Table{}, fmt.Errorf("calib: table input %d (%g) does not increase", i, mv[i])
		}
	}
	return Table{MV: mv, Out: out}, nil
}

// Apply interpolates at mv.
func (t Table) Apply(mv float64) float64 {
	n := len(t.MV)
	if mv <= t.MV[0] {
		return t.Out[0]
	}
	if mv >= t.MV[n-1] {
		return t.Out[n-1]
	}
	lo, hi := 0, n-1
	for hi-lo > 1 {
		m := (lo + hi) / 2
		if t.MV[m] <= mv {
			lo = m
		} else {
			hi = m
		}
	}
	f := (mv - t.MV[lo]) / (t.MV[hi] - t.MV[lo])
	return t.Out[lo] + f*(t.Out[hi]-t.Out[lo])
}

// Divider is an NTC thermistor to ground with a pull-up resistor to the ADC
// reference. The reading is ratiometric: R = Rpu·V/(Vref − V).
type Divider struct {
	PullupOhm float64
	RefMV     float64
}

// Resistance returns the thermistor's resistance at mv, +Inf at the rail.
func (d Divider) Resistance(mv float64) float64 {
	if mv >= d.RefMV {
		return math.Inf(1)
	}
	return d.PullupOhm * mv / (d.RefMV - mv)
}

// NTCBeta is a thermistor by the Beta equation,
// 1/T = 1/T0 + (1/B)·ln(R/R0), T in kelvin.
type NTCBeta struct {
	Divider
	R0Ohm, T0C, Beta float64
}

// Apply returns the temperature in °C at mv.
func (n NTCBeta) Apply(mv float64) float64 {
	return BetaTemp(n.Resistance(mv), n.R0Ohm, n.T0C, n.Beta)
}

// BetaTemp returns the temperature in °C of an NTC thermistor of resistance r.
// An open (infinite) or shorted (zero) thermistor gives NaN.
func BetaTemp(r, r0, t0C, beta float64) float64 {
	if !(r > 0) || math.IsInf(r, 1) {
		return math.NaN()
	}
	invT := 1/(t0C+273.15) + math.Log(r/r0)/beta
	return 1/invT - 273.15
}

// NTCSteinhartHart is a thermistor by the Steinhart–Hart equation,
// 1/T = A + B·ln R + C·(ln R)³, T in kelvin, R in ohms.
type NTCSteinhartHart struct {
	Divider
	A, B, C float64
}

// Apply returns the temperature in °C at mv.
func (n NTCSteinhartHart) Apply(mv float64) float64 {
	return SteinhartHartTemp(n.Resistance(mv), n.A, n.B, n.C)
}

// SteinhartHartTemp returns the temperature in °C at resistance r.
// An open or shorted thermistor gives NaN.
func SteinhartHartTemp(r, a, b, c float64) float64 {
	if !(r > 0) || math.IsInf(r, 1) {
		return math.NaN()
	}
	l := math.Log(r)
	return 1/(a+b*l+c*l*l*l) - 273.15
}

// Sensor is one calibrated input: the curve, the ADC that counts are read
// with, fault rails and the plausible range of the output.
type Sensor struct {
	Curve Curve
	// FaultBelowMV and FaultAboveMV are the open/short-circuit rails; a
	// reading outside them is a sensor fault. Zero values disable a rail.
	FaultBelowMV, FaultAboveMV float64
	// Min and Max bound the plausible output; both zero disables the check.
	Min, Max float64
	// ADCMax is the full-scale count (2^bits − 1); RefMV the reference.
	ADCMax, RefMV float64
}

// ErrNoCurve is returned by Validate for a sensor without a curve.
var ErrNoCurve = errors.New("calib: sensor has no curve")

// Validate checks the sensor's settings.
func (s Sensor) Validate() error {
	if s.Curve == nil {
		return ErrNoCurve
	}
	if s.ADCMax <= 0 || s.RefMV <= 0 {
		return fmt.Errorf("calib: ADC full scale %g and reference %g mV must be positive", s.ADCMax, s.RefMV)
	}
	if s.FaultAboveMV != 0 && s.FaultAboveMV <= s.FaultBelowMV {
		return fmt.Errorf("calib: fault rails %g..%g mV are empty", s.FaultBelowMV, s.FaultAboveMV)
	}
	if s.Max < s.Min {
		return fmt.Errorf("calib: plausible range %g..%g is empty", s.Min, s.Max)
	}
	if v, ok := s.Curve.(interface{ Validate() error }); ok {
		if err := v.Validate(); err != nil {
			return err
		}
	}
	return nil
}

// FullScale returns the largest count of a converter of the given
// resolution, 2^bits − 1: the nmax of the ratiometric divider formula
// R = Rpu·n/(nmax − n). It is 0 for bits outside 1–31.
func FullScale(bits int) float64 {
	if bits < 1 || bits > 31 {
		return 0
	}
	return float64(uint32(1)<<uint(bits) - 1)
}

// ApplyCounts calibrates a reading in raw ADC counts.
func (s *Sensor) ApplyCounts(counts float64) (float64, pipeline.Quality) {
	return s.Apply(s.CountsToMV(counts))
}

func finite(vs ...float64) bool {
	for _, v := range vs {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

// Validate rejects a line through two points at the same input.
func (l Linear) Validate() error {
	if !finite(l.MV0, l.Out0, l.MV1, l.Out1) {
		return fmt.Errorf("calib: linear: non-finite point")
	}
	if l.MV0 == l.MV1 {
		return fmt.Errorf("calib: linear: both points at %g mV", l.MV0)
	}
	return nil
}

// Validate checks the table as NewTable does.
func (t Table) Validate() error {
	_, err := NewTable(t.MV, t.Out)
	return err
}

// Validate checks the pull-up and the reference.
func (d Divider) Validate() error {
	if !(d.PullupOhm > 0) || !(d.RefMV > 0) || !finite(d.PullupOhm, d.RefMV) {
		return fmt.Errorf("calib: divider: pull-up %g Ω and reference %g mV must be positive", d.PullupOhm, d.RefMV)
	}
	return nil
}

// Validate checks the divider and the Beta parameters.
func (n NTCBeta) Validate() error {
	if err := n.Divider.Validate(); err != nil {
		return err
	}
	if !(n.R0Ohm > 0) || !(n.Beta > 0) || !(n.T0C > -273.15) || !finite(n.R0Ohm, n.Beta, n.T0C) {
		return fmt.Errorf("calib: ntc beta: R0 %g Ω, T0 %g °C, B %g K out of range", n.R0Ohm, n.T0C, n.Beta)
	}
	return nil
}

// Validate checks the divider and the coefficients.
func (n NTCSteinhartHart) Validate() error {
	if err := n.Divider.Validate(); err != nil {
		return err
	}
	if !finite(n.A, n.B, n.C) || !(n.B > 0) {
		return fmt.Errorf("calib: ntc steinhart-hart: coefficients %g, %g, %g: need finite values and B > 0", n.A, n.B, n.C)
	}
	return nil
}

// CountsToMV converts raw ADC counts to millivolts.
func (s *Sensor) CountsToMV(counts float64) float64 { return counts * s.RefMV / s.ADCMax }

// Apply calibrates a reading in millivolts and judges its quality.
func (s *Sensor) Apply(mv float64) (float64, pipeline.Quality) {
	if (s.FaultBelowMV != 0 && mv < s.FaultBelowMV) || (s.FaultAboveMV != 0 && mv > s.FaultAboveMV) {
		return math.NaN(), pipeline.SensorFault
	}
	v := s.Curve.Apply(mv)
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return math.NaN(), pipeline.SensorFault
	}
	if (s.Min != 0 || s.Max != 0) && (v < s.Min || v > s.Max) {
		return v, pipeline.OutOfRange
	}
	return v, pipeline.OK
}
