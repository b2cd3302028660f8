package calib

import (
	"math"
	"testing"

	"github.com/plenum-engine/plenum/pipeline"
)

func near(a, b, tol float64) bool { return math.Abs(a-b) <= tol }

func TestBetaWorkedExample(t *testing.T) {
	// esp32.implrust.com "B Equation" worked example: R0 = 10 kΩ at 298.15 K,
	// B = 3950 K, R = 10 475 Ω gives T = 297.109 K = 23.96 °C.
	got := BetaTemp(10475, 10000, 25, 3950)
	if !near(got, 297.109-273.15, 0.005) {
		t.Fatalf("T = %.4f °C, want 23.959", got)
	}
	// Identity of the Beta equation: R = R0 gives T0.
	if got := BetaTemp(10000, 10000, 25, 3950); !near(got, 25, 1e-9) {
		t.Fatalf("T(R0) = %v, want 25", got)
	}
}

func TestSteinhartHartExample(t *testing.T) {
	// Wikipedia "Steinhart–Hart equation": a typical 3 kΩ-at-25 °C thermistor,
	// A = 1.40e-3, B = 2.37e-4, C = 9.90e-8 (coefficients from memory of that
	// page); the rounded coefficients give 25.5 °C at 3000 Ω, hence ±0.6 K.
	got := SteinhartHartTemp(3000, 1.40e-3, 2.37e-4, 9.90e-8)
	if !near(got, 25, 0.6) {
		t.Fatalf("T(3000 Ω) = %.3f °C, want 25 ± 0.6", got)
	}
}

func TestDividerIdentity(t *testing.T) {
	// Ratiometric divider, derived: at half the reference the thermistor equals
	// the pull-up; at a quarter it is a third of it.
	d := Divider{PullupOhm: 2490, RefMV: 5000}
	if r := d.Resistance(2500); !near(r, 2490, 1e-9) {
		t.Fatalf("R(Vref/2) = %v", r)
	}
	if r := d.Resistance(1250); !near(r, 830, 1e-9) {
		t.Fatalf("R(Vref/4) = %v", r)
	}
}

func TestLinearAndTable(t *testing.T) {
	l := Linear{MV0: 400, Out0: 20000, MV1: 4650, Out1: 300000}
	if v := l.Apply(400); v != 20000 {
		t.Fatalf("linear at first point %v", v)
	}
	if v := l.Apply(2525); !near(v, 160000, 1e-6) {
		t.Fatalf("linear midpoint %v, want 160000", v)
	}
	tb, err := NewTable([]float64{500, 1500, 2500}, []float64{120, 70, 35})
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct{ mv, want float64 }{{0, 120}, {500, 120}, {1000, 95}, {2000, 52.5}, {2500, 35}, {9000, 35}} {
		if got := tb.Apply(c.mv); !near(got, c.want, 1e-9) {
			t.Errorf("table(%v) = %v, want %v", c.mv, got, c.want)
		}
	}
	if _, err := NewTable([]float64{1, 1}, []float64{0, 0}); err == nil {
		t.Fatal("non-increasing table accepted")
	}
}

func TestFaultsAndRange(t *testing.T) {
	s := Sensor{Curve: Linear{0, 0, 5000, 100}, FaultBelowMV: 100, FaultAboveMV: 4900, Min: 0, Max: 90, ADCMax: 1023, RefMV: 5000}
	if err := s.Validate(); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		mv   float64
		want pipeline.Quality
	}{{50, pipeline.SensorFault}, {4950, pipeline.SensorFault}, {2500, pipeline.OK}, {4700, pipeline.OutOfRange}}
	for _, c := range cases {
		if _, q := s.Apply(c.mv); q != c.want {
			t.Errorf("Apply(%v) quality %v, want %v", c.mv, q, c.want)
		}
	}
	// An NTC at the rail (open circuit) is infinite resistance: a fault, not a number.
	n := Sensor{Curve: NTCBeta{Divider{2490, 5000}, 2500, 25, 3950}, ADCMax: 1023, RefMV: 5000}
	if _, q := n.Apply(5000); q != pipeline.SensorFault {
		t.Errorf("open thermistor gave quality %v", q)
	}
	if mv := s.CountsToMV(1023); mv != 5000 {
		t.Errorf("full-scale counts = %v mV", mv)
	}
}
