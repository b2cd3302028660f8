package derive

import (
	"math"
	"testing"

	"pgregory.net/rapid"
)

func near(a, b, rel float64) bool { return math.Abs(a-b) <= rel*math.Max(math.Abs(b), 1e-12) }

func TestAirDensity(t *testing.T) {
	// ISO 2533: sea-level density 1.225 kg/m³ at 101 325 Pa and 288.15 K.
	if got := AirDensity(101325, 15); !near(got, 1.225, 1e-4) {
		t.Fatalf("ρ0 = %.5f, want 1.225", got)
	}
}

func TestSpeedDensityWorkedCase(t *testing.T) {
	// Derived from Heywood eq. 2.27: η_v = 0.85, 100 kPa, 25 °C, 2.0 L,
	// 3000 rpm: ρ = 100000/(287.05·298.15) = 1.16844 kg/m³ and
	// ṁ = 0.85·1.16844·0.002·50/2 = 0.049659 kg/s.
	got := SpeedDensity(100000, 25, 3000, 0.002, 0.85)
	if !near(got, 0.049659, 1e-4) {
		t.Fatalf("ṁ = %.6f kg/s, want 0.049659", got)
	}
	if SpeedDensity(100000, 25, 0, 0.002, 0.85) != 0 {
		t.Fatal("flow at 0 rpm")
	}
}

func TestAirMassFlowMonotonic(t *testing.T) {
	// Property (ideal-gas law): flow rises with MAP and falls with IAT.
	rapid.Check(t, func(t *rapid.T) {
		p := rapid.Float64Range(10000, 400000).Draw(t, "map")
		dp := rapid.Float64Range(1, 50000).Draw(t, "dp")
		iat := rapid.Float64Range(-30, 120).Draw(t, "iat")
		dt := rapid.Float64Range(0.1, 40).Draw(t, "dt")
		rpm := rapid.Float64Range(500, 9000).Draw(t, "rpm")
		base := SpeedDensity(p, iat, rpm, 0.002, 0.9)
		if !(SpeedDensity(p+dp, iat, rpm, 0.002, 0.9) > base) {
			t.Fatalf("flow did not rise with MAP")
		}
		if !(SpeedDensity(p, iat+dt, rpm, 0.002, 0.9) < base) {
			t.Fatalf("flow did not fall with IAT")
		}
	})
}

func TestVETable(t *testing.T) {
	tb := &VETable{
		Speeds:    []float64{1000, 3000},
		Pressures: []float64{50000, 150000},
		Values:    [][]float64{{0.6, 0.8}, {0.8, 1.0}},
	}
	if err := tb.Validate(); err != nil {
		t.Fatal(err)
	}
	cases := []struct{ rpm, p, want float64 }{
		{1000, 50000, 0.6}, {3000, 150000, 1.0},
		{2000, 100000, 0.8}, // centre of a bilinear patch: mean of the corners (analytic)
		{1500, 50000, 0.65},
		{500, 10000, 0.6}, {9000, 900000, 1.0}, // held at the edges
	}
	for _, c := range cases {
		if got := tb.At(c.rpm, c.p); !near(got, c.want, 1e-12) {
			t.Errorf("At(%v, %v) = %v, want %v", c.rpm, c.p, got, c.want)
		}
	}
	bad := &VETable{Speeds: []float64{1000, 1000}, Pressures: []float64{1, 2}, Values: [][]float64{{1, 1}, {1, 1}}}
	if bad.Validate() == nil {
		t.Fatal("flat axis accepted")
	}
}

func TestBoostAndRatio(t *testing.T) {
	if b := Boost(201325, 101325); b != 100000 {
		t.Fatalf("boost %v", b)
	}
	if pr := PressureRatio(202650, 101325); pr != 2 {
		t.Fatalf("PR %v", pr)
	}
	if !math.IsNaN(PressureRatio(1, 0)) {
		t.Fatal("PR with zero inlet")
	}
}

func TestFuelsAndFlow(t *testing.T) {
	cases := []struct {
		fuel   string
		stoich float64
	}{
		{"gasoline", 14.7}, // common value; Heywood App. D: 14.6 for CH1.87
		{"diesel", 14.5},
		{"e100", 9.0}, // C2H5OH: 3 O2 per mole → 3·4.76·28.97/46.07 = 8.98
		{"cng", 17.2}, // CH4: 2·4.76·28.97/16.04 = 17.19
		{"methanol", 6.47},
	}
	for _, c := range cases {
		f, err := LookupFuel(c.fuel)
		if err != nil || f.Stoich != c.stoich {
			t.Errorf("%s: %+v %v", c.fuel, f, err)
		}
	}
	if _, err := LookupFuel("kerosene"); err == nil {
		t.Error("unknown fuel accepted")
	}
	// Derived: 20 g/s of air at λ = 1 on gasoline (14.7) is 1.3605 g/s of fuel,
	// 4.898 kg/h, which at 745 kg/m³ is 6.575 L/h.
	m := FuelMassFlow(0.020, 1, 14.7)
	if !near(m, 0.0013605, 1e-4) {
		t.Fatalf("fuel mass flow %v", m)
	}
	if lph := FuelVolumeFlow(m, 745) * 1000 * 3600; !near(lph, 6.575, 1e-3) {
		t.Fatalf("fuel volume flow %v L/h, want 6.575", lph)
	}
}

func TestWideband(t *testing.T) {
	w := Wideband{0, 0.68, 5, 1.36}
	for _, c := range []struct{ v, want float64 }{{0, 0.68}, {5, 1.36}, {2.5, 1.02}} {
		if got := w.Lambda(c.v); !near(got, c.want, 1e-12) {
			t.Errorf("λ(%v V) = %v, want %v", c.v, got, c.want)
		}
	}
	if afr := AFR(1, 14.7); afr != 14.7 {
		t.Errorf("AFR at λ 1 = %v", afr)
	}
}
