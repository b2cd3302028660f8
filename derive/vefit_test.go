package derive

import (
	"strings"
	"testing"
)

func TestMeasuredVEInvertsSpeedDensity(t *testing.T) {
	// Analytic identity: the flow speed-density gives at VE 0.85 (the
	// Heywood eq. 2.27 worked case, 0.049659 kg/s) measures back as 0.85.
	m := SpeedDensity(100000, 25, 3000, 0.002, 0.85)
	if ve := MeasuredVE(m, 100000, 25, 3000, 0.002); !near(ve, 0.85, 1e-12) {
		t.Fatalf("VE = %v, want 0.85", ve)
	}
	if ve := MeasuredVE(0.05, 100000, 25, 0, 0.002); ve == ve {
		t.Fatalf("VE at 0 rpm = %v, want NaN", ve)
	}
}

func TestVEAccumulatorCSV(t *testing.T) {
	a, err := NewVEAccumulator([]float64{1000, 3000}, []float64{50000, 100000})
	if err != nil {
		t.Fatal(err)
	}
	a.Add(1100, 52000, 0.80)
	a.Add(900, 48000, 0.84)
	a.Add(2900, 99000, 0.95)
	a.Add(2900, 99000, 5) // implausible: ignored
	var b strings.Builder
	if err := a.WriteCSV(&b); err != nil {
		t.Fatal(err)
	}
	want := "engine_speed_rpm\\manifold_pressure_kpa,50,100\n1000,0.8200,\n3000,,0.9500\n"
	if b.String() != want {
		t.Fatalf("csv:\n%s\nwant:\n%s", b.String(), want)
	}
}
