package calib

import (
	"math"
	"testing"

	"github.com/plenum-engine/plenum/pipeline"
)

// TestRatiometricCounts checks the divider read-out in counts against the
// ratiometric identity R = Rpu·n/(nmax − n) (derived from the divider
// equation V = Vref·R/(R + Rpu) with V/Vref = n/nmax).
func TestRatiometricCounts(t *testing.T) {
	s := Sensor{ADCMax: FullScale(10), RefMV: 5000}
	d := Divider{PullupOhm: 2490, RefMV: 5000}
	for _, n := range []float64{1, 100, 511.5, 512, 1000, 1022} {
		got := d.Resistance(s.CountsToMV(n))
		want := 2490 * n / (1023 - n)
		if math.Abs(got-want) > 1e-9*want {
			t.Errorf("R(%v counts) = %.9g Ω, want %.9g", n, got, want)
		}
	}
}

// TestBetaRoundTrip runs the Beta model forwards (R = R0·exp(B(1/T − 1/T0)),
// Wikipedia "Thermistor", and the divider equation) and back through the
// calibration: the identity must hold over the automotive range.
func TestBetaRoundTrip(t *testing.T) {
	n := NTCBeta{Divider: Divider{PullupOhm: 2490, RefMV: 5000}, R0Ohm: 2500, T0C: 25, Beta: 3950}
	s := Sensor{Curve: n, ADCMax: 1023, RefMV: 5000}
	if err := s.Validate(); err != nil {
		t.Fatal(err)
	}
	for tc := -40.0; tc <= 150; tc += 7.5 {
		r := 2500 * math.Exp(3950*(1/(tc+273.15)-1/298.15))
		mv := 5000 * r / (r + 2490)
		got, q := s.Apply(mv)
		if q != pipeline.OK || math.Abs(got-tc) > 1e-9 {
			t.Errorf("T(%v °C) read back as %v %v", tc, got, q)
		}
	}
}

// TestBetaWorkedExampleThroughDivider feeds the published example
// (esp32.implrust.com "B Equation": R0 = 10 kΩ at 298.15 K, B = 3950 K,
// R = 10 475 Ω → 23.96 °C) through a 10 kΩ pull-up divider, in millivolts and
// in 12-bit counts.
func TestBetaWorkedExampleThroughDivider(t *testing.T) {
	n := NTCBeta{Divider: Divider{PullupOhm: 10000, RefMV: 3300}, R0Ohm: 10000, T0C: 25, Beta: 3950}
	s := Sensor{Curve: n, ADCMax: FullScale(12), RefMV: 3300}
	mv := 3300 * 10475.0 / (10475 + 10000)
	if got, q := s.Apply(mv); q != pipeline.OK || math.Abs(got-23.96) > 0.005 {
		t.Errorf("mV path: %v %v, want 23.96 °C", got, q)
	}
	counts := FullScale(12) * 10475.0 / (10475 + 10000) // not rounded: an exact ratio
	if got, q := s.ApplyCounts(counts); q != pipeline.OK || math.Abs(got-23.96) > 0.005 {
		t.Errorf("counts path: %v %v, want 23.96 °C", got, q)
	}
	// Rounding to a whole count moves the reading by less than one LSB's worth.
	got, _ := s.ApplyCounts(math.Round(counts))
	if math.Abs(got-23.96) > 0.05 {
		t.Errorf("rounded counts: %v °C", got)
	}
}

// TestSteinhartHartThroughDivider uses Wikipedia's example coefficients for
// a 3 kΩ-at-25 °C thermistor (from memory of that page; ±0.6 K for their
// rounding) read at mid-scale of a 3 kΩ pull-up divider (R = Rpu, derived).
func TestSteinhartHartThroughDivider(t *testing.T) {
	s := Sensor{Curve: NTCSteinhartHart{Divider: Divider{PullupOhm: 3000, RefMV: 5000}, A: 1.40e-3, B: 2.37e-4, C: 9.90e-8},
		ADCMax: 1023, RefMV: 5000}
	if got, q := s.ApplyCounts(511.5); q != pipeline.OK || math.Abs(got-25) > 0.6 {
		t.Errorf("T = %v %v, want 25 ± 0.6 °C", got, q)
	}
	// Colder is higher resistance is a higher divider voltage (an NTC).
	cold, _ := s.ApplyCounts(800)
	hot, _ := s.ApplyCounts(200)
	if !(cold < 25 && hot > 25) {
		t.Errorf("not an NTC: T(800)=%v T(200)=%v", cold, hot)
	}
}

func TestThermistorOpenAndShort(t *testing.T) {
	n := NTCBeta{Divider: Divider{PullupOhm: 2490, RefMV: 5000}, R0Ohm: 2500, T0C: 25, Beta: 3950}
	cases := []struct {
		name  string
		s     Sensor
		count float64
		want  pipeline.Quality
	}{
		{"open, no rails: at the top rail", Sensor{Curve: n, ADCMax: 1023, RefMV: 5000}, 1023, pipeline.SensorFault},
		{"short, no rails: at ground", Sensor{Curve: n, ADCMax: 1023, RefMV: 5000}, 0, pipeline.SensorFault},
		{"open by rail margin", Sensor{Curve: n, ADCMax: 1023, RefMV: 5000, FaultBelowMV: 20, FaultAboveMV: 4980}, 1020, pipeline.SensorFault},
		{"short by rail margin", Sensor{Curve: n, ADCMax: 1023, RefMV: 5000, FaultBelowMV: 20, FaultAboveMV: 4980}, 3, pipeline.SensorFault},
		{"inside the rails", Sensor{Curve: n, ADCMax: 1023, RefMV: 5000, FaultBelowMV: 20, FaultAboveMV: 4980}, 512, pipeline.OK},
		{"implausibly hot", Sensor{Curve: n, ADCMax: 1023, RefMV: 5000, FaultBelowMV: 20, FaultAboveMV: 4980, Min: -40, Max: 150}, 10, pipeline.OutOfRange},
	}
	for _, c := range cases {
		if err := c.s.Validate(); err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		v, q := c.s.ApplyCounts(c.count)
		if q != c.want {
			t.Errorf("%s: %v counts → %v %v, want %v", c.name, c.count, v, q, c.want)
		}
		if q == pipeline.SensorFault && !math.IsNaN(v) {
			t.Errorf("%s: a fault carries value %v, want NaN", c.name, v)
		}
	}
}

func TestValidateRejects(t *testing.T) {
	good := NTCBeta{Divider: Divider{PullupOhm: 2490, RefMV: 5000}, R0Ohm: 2500, T0C: 25, Beta: 3950}
	cases := []struct {
		name string
		s    Sensor
	}{
		{"no curve", Sensor{ADCMax: 1023, RefMV: 5000}},
		{"no ADC", Sensor{Curve: good}},
		{"coincident linear points", Sensor{Curve: Linear{1000, 0, 1000, 1}, ADCMax: 1023, RefMV: 5000}},
		{"unsorted table", Sensor{Curve: Table{MV: []float64{2, 1}, Out: []float64{0, 1}}, ADCMax: 1023, RefMV: 5000}},
		{"NaN table", Sensor{Curve: Table{MV: []float64{1, math.NaN()}, Out: []float64{0, 1}}, ADCMax: 1023, RefMV: 5000}},
		{"no pull-up", Sensor{Curve: NTCBeta{Divider: Divider{RefMV: 5000}, R0Ohm: 2500, T0C: 25, Beta: 3950}, ADCMax: 1023, RefMV: 5000}},
		{"zero beta", Sensor{Curve: NTCBeta{Divider: Divider{PullupOhm: 1, RefMV: 5000}, R0Ohm: 2500, T0C: 25}, ADCMax: 1023, RefMV: 5000}},
		{"S-H with B ≤ 0", Sensor{Curve: NTCSteinhartHart{Divider: Divider{PullupOhm: 1, RefMV: 5000}, A: 1e-3}, ADCMax: 1023, RefMV: 5000}},
		{"empty range", Sensor{Curve: good, ADCMax: 1023, RefMV: 5000, Min: 10, Max: 5}},
		{"empty rails", Sensor{Curve: good, ADCMax: 1023, RefMV: 5000, FaultBelowMV: 4000, FaultAboveMV: 1000}},
	}
	for _, c := range cases {
		if err := c.s.Validate(); err == nil {
			t.Errorf("%s: accepted", c.name)
		}
	}
	if FullScale(10) != 1023 || FullScale(12) != 4095 || FullScale(0) != 0 {
		t.Errorf("FullScale: %v %v %v", FullScale(10), FullScale(12), FullScale(0))
	}
}

func TestTableMonotonicInterpolation(t *testing.T) {
	// A falling output (a thermistor-like table) over rising input is fine;
	// between points the value is on the chord (derived: linear interpolation).
	tb, err := NewTable([]float64{0, 1000, 4000}, []float64{150, 100, -40})
	if err != nil {
		t.Fatal(err)
	}
	s := Sensor{Curve: tb, ADCMax: 1023, RefMV: 5000}
	if v, q := s.Apply(2500); q != pipeline.OK || math.Abs(v-30) > 1e-12 {
		t.Errorf("table(2500 mV) = %v %v, want 30", v, q)
	}
}
