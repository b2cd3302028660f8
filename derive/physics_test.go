package derive

import (
	"math"
	"testing"

	"pgregory.net/rapid"
)

func TestCompressorIsentropic(t *testing.T) {
	// Ideal-gas isentropic compression T2s = T1·pr^((γ−1)/γ), γ = 1.4
	// (NBS Circular 564), Heywood §6.8 (from memory). Hand-worked: T1 =
	// 298.15 K, pr = 2.0: T2s = 363.449 K; at η = 0.70 T2 = 298.15 +
	// 65.299/0.70 = 391.43 K (118.3 °C).
	if got := IsentropicOutletTemperature(298.15, 2, Gamma); !near(got, 363.449, 1e-5) {
		t.Fatalf("T2s = %.4f K, want 363.449", got)
	}
	t2 := CompressorOutletTemperature(25, 2, 0.70)
	if !near(t2+ZeroCelsius, 391.43, 2e-5) {
		t.Fatalf("T2 = %.3f K, want 391.43", t2+ZeroCelsius)
	}
	if eff := CompressorEfficiency(25, 391.43-ZeroCelsius, 2); !near(eff, 0.70, 1e-4) {
		t.Fatalf("η = %.5f, want 0.70", eff)
	}
	for _, c := range []struct{ t1, t2, pr float64 }{{25, 25, 2}, {25, 20, 2}, {25, 90, 0}, {25, 90, -1}} {
		if e := CompressorEfficiency(c.t1, c.t2, c.pr); !math.IsNaN(e) {
			t.Errorf("CompressorEfficiency(%v, %v, %v) = %v, want NaN", c.t1, c.t2, c.pr, e)
		}
	}
	// P = ṁ·cp·ΔT with cp = 1005 J/(kg·K) (NBS Circular 564): 0.1 kg/s
	// heated by 93.28 K absorbs 9.375 kW (derived).
	if p := CompressorPower(0.1, 25, 25+93.28); !near(p, 9374.64, 1e-6) {
		t.Fatalf("compressor power %v W", p)
	}
}

func TestCompressorInlet(t *testing.T) {
	if p := CompressorInletPressure(97000, true, 101325, 1500); p != 97000 {
		t.Errorf("with sensor: %v", p)
	}
	if p := CompressorInletPressure(0, false, 101325, 1500); p != 99825 {
		t.Errorf("baro less filter drop: %v", p)
	}
	if pr := PressureRatio(2*99825, CompressorInletPressure(0, false, 101325, 1500)); pr != 2 {
		t.Errorf("pressure ratio %v", pr)
	}
}

func TestCorrectedFlow(t *testing.T) {
	// Wikipedia "Corrected flow": ṁ·√(T1/Tref)/(p1/pref), standard day
	// 101.325 kPa / 288.15 K. Derived: 0.1 kg/s at 95 kPa, 35 °C gives
	// 0.1·√(308.15/288.15)·101.325/95 = 0.11030 kg/s.
	r := StandardDay()
	if got := r.CorrectedMassFlow(0.1, 95000, 35); !near(got, 0.11030, 5e-5) {
		t.Fatalf("corrected flow %.5f, want 0.11030", got)
	}
	// Identity: at the reference state the corrected values equal the raw ones.
	if got := r.CorrectedMassFlow(0.2, StdPressure, StdTemperature-ZeroCelsius); !near(got, 0.2, 1e-12) {
		t.Fatalf("at reference: %v", got)
	}
	if got := r.CorrectedSpeed(150000, StdTemperature-ZeroCelsius); !near(got, 150000, 1e-12) {
		t.Fatalf("speed at reference: %v", got)
	}
	// N/√(T1/Tref): 4·288.15 K inlet halves the corrected speed (analytic).
	if got := r.CorrectedSpeed(100000, 4*StdTemperature-ZeroCelsius); !near(got, 50000, 1e-12) {
		t.Fatalf("corrected speed %v", got)
	}
	// A configured reference: 100 kPa / 298.15 K (a map's own choice).
	own := FlowReference{Pressure: 100000, Temperature: 298.15}
	if got := own.CorrectedMassFlow(0.1, 100000, 25); !near(got, 0.1, 1e-12) {
		t.Fatalf("own reference %v", got)
	}
	if !math.IsNaN(r.CorrectedMassFlow(0.1, 0, 20)) || !math.IsNaN(r.CorrectedSpeed(1, -300)) {
		t.Fatal("non-physical inlet accepted")
	}
}

func TestIntercoolerEffectiveness(t *testing.T) {
	// ε = (T_in − T_out)/(T_in − T_cool) (Heywood, from memory).
	// Derived: 120 °C in, 45 °C out, 20 °C ambient gives 75/100 = 0.75.
	cases := []struct{ in, out, cool, want float64 }{
		{120, 45, 20, 0.75},
		{120, 120, 20, 0}, // no cooling
		{120, 20, 20, 1},  // ideal cooler
	}
	for _, c := range cases {
		if got := IntercoolerEffectiveness(c.in, c.out, c.cool); !near(got, c.want, 1e-12) && got != c.want {
			t.Errorf("ε(%v, %v, %v) = %v, want %v", c.in, c.out, c.cool, got, c.want)
		}
	}
	if !math.IsNaN(IntercoolerEffectiveness(20, 20, 20)) {
		t.Error("zero potential not NaN")
	}
}

func TestPowerFromTorque(t *testing.T) {
	// P = 2π·N·T (Heywood eq. 2.2, from memory); derived: 200 N·m at
	// 3000 rpm = 62.83 kW, and P[kW] = T·n/9549.3.
	if p := PowerFromTorque(200, 3000); !near(p, 62831.85, 1e-6) {
		t.Fatalf("P = %v W", p)
	}
	if p := PowerFromTorque(350, 5200) / 1000; !near(p, 350*5200/9549.297, 1e-6) {
		t.Fatalf("P = %v kW", p)
	}
	if tq := TorqueFromPower(PowerFromTorque(123, 4567), 4567); !near(tq, 123, 1e-12) {
		t.Fatalf("round trip %v", tq)
	}
}

func TestSaturationVapourPressure(t *testing.T) {
	// Buck (1981/1996): e_s(0 °C) = 611.21 Pa by construction; water boils
	// at 100 °C under 101.325 kPa (definition of the normal boiling point),
	// and 2.339 kPa at 20 °C is the tabulated steam-table value (from memory).
	cases := []struct{ tC, want, rel float64 }{
		{0, 611.21, 1e-9},
		{100, 101325, 0.003},
		{20, 2339, 0.002},
	}
	for _, c := range cases {
		if got := SaturationVapourPressure(c.tC); !near(got, c.want, c.rel) {
			t.Errorf("e_s(%v °C) = %.1f Pa, want %.1f", c.tC, got, c.want)
		}
	}
	if pd := DryPressure(101325, 20, 0.5); !near(pd, 101325-0.5*SaturationVapourPressure(20), 1e-15) {
		t.Errorf("dry pressure %v", pd)
	}
}

func TestPowerCorrection(t *testing.T) {
	// Derived from the published formulas (SAE J1349 JUN1990; ISO 1585 and
	// DIN 70020 from memory), dry air so p_d = p.
	cases := []struct {
		std  Standard
		a    Ambient
		want float64
	}{
		// 1.18·(99/95)·√(303/298) − 0.18 = 1.05999
		{SAEJ1349, Ambient{95000, 30, 0}, 1.18*(99.0/95)*math.Sqrt(303.0/298) - 0.18},
		// (99/95)^1.2·(303.15/298)^0.6
		{ISO1585, Ambient{95000, 30, 0}, math.Pow(99.0/95, 1.2) * math.Pow(303.15/298, 0.6)},
		// (1013/950)·√(303.15/293)
		{DIN70020, Ambient{95000, 30, 0}, 1013.0 / 950 * math.Sqrt(303.15/293)},
	}
	for _, c := range cases {
		got, err := c.std.Factor(c.a)
		if err != nil || !near(got, c.want, 1e-12) {
			t.Errorf("%v: %v %v, want %v", c.std, got, err, c.want)
		}
	}
	// Hand-computed value of the first case: 1.0600 (derived).
	if f, _ := SAEJ1349.Factor(Ambient{95000, 30, 0}); !near(f, 1.05999, 1e-4) {
		t.Errorf("SAE J1349 factor %v", f)
	}
	// Thin hot air needs a larger factor (all three formulas).
	for _, s := range []Standard{SAEJ1349, ISO1585, DIN70020} {
		lo, _ := s.Factor(Ambient{101000, 20, 0})
		hi, _ := s.Factor(Ambient{90000, 35, 0.6})
		if !(hi > lo) {
			t.Errorf("%v: factor at 90 kPa/35 °C %v not above 101 kPa/20 °C %v", s, hi, lo)
		}
	}
	// Humidity lowers dry pressure and so raises the factor.
	dry, _ := SAEJ1349.Factor(Ambient{99000, 25, 0})
	wet, _ := SAEJ1349.Factor(Ambient{99000, 25, 0.8})
	if !(wet > dry) {
		t.Errorf("humid %v not above dry %v", wet, dry)
	}
	bad := []struct {
		s Standard
		a Ambient
	}{
		{SAEJ1349, Ambient{0, 25, 0}},
		{ISO1585, Ambient{99000, -300, 0}},
		{DIN70020, Ambient{99000, 25, 1.5}},
		{Standard(42), Ambient{99000, 25, 0}},
		{SAEJ1349, Ambient{1000, 25, 1}}, // dry pressure below zero
	}
	for _, b := range bad {
		if _, err := b.s.Factor(b.a); err == nil {
			t.Errorf("%v %+v accepted", b.s, b.a)
		}
	}
	if !ISO1585Valid(1) || ISO1585Valid(1.1) || ISO1585Valid(0.9) {
		t.Error("ISO 1585 validity range")
	}
}

func TestParseStandard(t *testing.T) {
	for _, s := range []Standard{SAEJ1349, ISO1585, DIN70020} {
		got, err := ParseStandard(s.String())
		if err != nil || got != s {
			t.Errorf("%v: %v %v", s, got, err)
		}
	}
	if _, err := ParseStandard("sae"); err == nil {
		t.Error("unknown name accepted")
	}
}

func TestCorrectedPowerAtReference(t *testing.T) {
	// Property (definition of the reference condition): corrected power
	// equals measured power at the standard's reference state, whatever the
	// humidity when total pressure carries the vapour on top of the dry
	// reference.
	rapid.Check(t, func(t *rapid.T) {
		s := rapid.SampledFrom([]Standard{SAEJ1349, ISO1585, DIN70020}).Draw(t, "std")
		p := rapid.Float64Range(1, 2e6).Draw(t, "power")
		a := s.Reference()
		if s != DIN70020 {
			a.Humidity = rapid.Float64Range(0, 1).Draw(t, "rh")
			a.Pressure += a.Humidity * SaturationVapourPressure(a.Temperature)
		}
		got, err := CorrectedPower(p, s, a)
		if err != nil || !near(got, p, 1e-12) {
			t.Fatalf("%v at %+v: %v %v, want %v", s, a, got, err, p)
		}
	})
}

func TestBSFC(t *testing.T) {
	// bsfc = ṁ_f/P_b (Heywood §2.7, from memory); derived: 5 g/s at 60 kW =
	// 300 g/kWh, and at Q_LHV = 43 MJ/kg η_f = 3600/(300·43) = 27.9 %.
	b := BSFC(0.005, 60000)
	if g := GramsPerKWh(b); !near(g, 300, 1e-12) {
		t.Fatalf("bsfc %v g/kWh", g)
	}
	if e := FuelConversionEfficiency(b, 43e6); !near(e, 3600.0/(300*43), 1e-12) || !near(e, 0.279, 2e-3) {
		t.Fatalf("η_f %v", e)
	}
	if !math.IsNaN(BSFC(0.005, 0)) || !math.IsNaN(FuelConversionEfficiency(0, 43e6)) {
		t.Fatal("zero power or bsfc not NaN")
	}
}

func TestFuelsTable(t *testing.T) {
	// Each stoichiometric ratio against the combustion equation
	// 4.76·(x + y/4 − z/2)·28.97/M_f for the pure fuels (derived), within
	// the spread the sources give.
	combust := func(x, y, z, m float64) float64 { return 4.76 * (x + y/4 - z/2) * 28.97 / m }
	checks := map[string]float64{
		"e100":     combust(2, 6, 1, 46.07),
		"methanol": combust(1, 4, 1, 32.04),
		"propane":  combust(3, 8, 0, 44.10),
		"cng":      combust(1, 4, 0, 16.04),
	}
	for name, want := range checks {
		f, err := LookupFuel(name)
		if err != nil || !near(f.Stoich, want, 0.005) {
			t.Errorf("%s: stoich %v, combustion equation %v (%v)", name, f.Stoich, want, err)
		}
	}
	for _, n := range FuelNames() {
		f, err := LookupFuel(n)
		if err != nil || f.Name != n || !(f.Stoich > 0) || !(f.Density > 0) || f.StoichSource == "" || f.DensitySource == "" {
			t.Errorf("%s: %+v %v", n, f, err)
		}
	}
}

func TestWidebandValidate(t *testing.T) {
	if err := (Wideband{0, 0.68, 5, 1.36}).Validate(); err != nil {
		t.Fatal(err)
	}
	for _, w := range []Wideband{{1, 0.7, 1, 1.3}, {0, 0, 5, 1.36}, {0, math.NaN(), 5, 1}, {0, 0.68, math.Inf(1), 1.36}} {
		if w.Validate() == nil {
			t.Errorf("%+v accepted", w)
		}
	}
}

func TestVETableMalformed(t *testing.T) {
	// A table that fails Validate must not panic in At.
	tb := &VETable{Speeds: []float64{1000, 2000}, Pressures: []float64{1, 2}, Values: [][]float64{{1}}}
	if tb.Validate() == nil || !math.IsNaN(tb.At(1500, 1.5)) {
		t.Fatal("malformed table")
	}
}

func BenchmarkPhysicsPerSample(b *testing.B) {
	tb := &VETable{
		Speeds:    []float64{1000, 2000, 3000, 4000, 5000, 6000, 7000},
		Pressures: []float64{30000, 60000, 100000, 150000, 200000, 250000},
		Values:    make([][]float64, 7),
	}
	for i := range tb.Values {
		tb.Values[i] = []float64{0.6, 0.7, 0.85, 0.9, 0.92, 0.93}
	}
	w := Wideband{0, 0.68, 5, 1.36}
	ref := StandardDay()
	b.ReportAllocs()
	var sink float64
	for i := 0; b.Loop(); i++ {
		rpm := 1000 + float64(i%6000)
		mp := 30000 + float64(i%220000)
		ve := tb.At(rpm, mp)
		m := SpeedDensity(mp, 30, rpm, 0.002, ve)
		lam := w.Lambda(2.5)
		f := FuelMassFlow(m, lam, 14.7)
		sink += FuelVolumeFlow(f, 745) + Boost(mp, 101325) + PressureRatio(mp, 99000)
		sink += CompressorEfficiency(25, 110, mp/99000) + ref.CorrectedMassFlow(m, 99000, 25)
		sink += IntercoolerEffectiveness(110, 45, 25) + PowerFromTorque(300, rpm)
		cf, _ := SAEJ1349.Factor(Ambient{99000, 25, 0.4})
		sink += cf
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/sample")
	_ = sink
}
