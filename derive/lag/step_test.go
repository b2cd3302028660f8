package lag

import (
	"math"
	"testing"
)

func near(a, b, rel float64) bool { return math.Abs(a-b) <= rel*math.Max(math.Abs(b), 1e-12) }

func sampled(n int, dt float64, f func(t float64) float64) []Point {
	tr := make([]Point, n)
	for i := range tr {
		t := float64(i) * dt
		tr[i] = Point{T: t, V: f(t)}
	}
	return tr
}

func TestFirstOrderLag(t *testing.T) {
	// First-order lag y = K(1 − e^(−t/τ)): 10–90 % rise t_r = τ·ln 9
	// (analytic; Dorf & Bishop 10–90 % definition), T50 = τ·ln 2, 2 %
	// settling τ·ln 50 (derived), no overshoot. Here a boost step from
	// 100 kPa to 200 kPa with τ = 0.4 s sampled at 1 kHz.
	tau := 0.4
	tr := sampled(4000, 0.001, func(t float64) float64 { return 100000 + 100000*(1-math.Exp(-t/tau)) })
	m, err := Analyze(tr, 100000, 200000, 0)
	if err != nil {
		t.Fatal(err)
	}
	if !near(m.Rise, tau*math.Log(9), 1e-4) {
		t.Errorf("rise %.5f s, want τ·ln 9 = %.5f", m.Rise, tau*math.Log(9))
	}
	if !near(m.T50, tau*math.Ln2, 1e-4) || !near(m.T10, tau*math.Log(10.0/9), 1e-3) {
		t.Errorf("T10 %.5f T50 %.5f", m.T10, m.T50)
	}
	if !m.Settled || !near(m.Settling, tau*math.Log(50), 1e-4) {
		t.Errorf("settling %.5f (%v), want τ·ln 50 = %.5f", m.Settling, m.Settled, tau*math.Log(50))
	}
	if m.Overshoot != 0 {
		t.Errorf("overshoot %v", m.Overshoot)
	}
}

func TestFirstOrderFalling(t *testing.T) {
	// The same lag stepping down (a lift-off) gives the same times.
	tau := 0.25
	tr := sampled(3000, 0.001, func(t float64) float64 { return 5 * math.Exp(-t/tau) })
	m, err := Analyze(tr, 5, 0, 0)
	if err != nil || !near(m.Rise, tau*math.Log(9), 1e-4) {
		t.Fatalf("falling rise %v %v", m.Rise, err)
	}
}

func TestSecondOrderUnderdamped(t *testing.T) {
	// y = 1 − e^(−ζωt)/√(1−ζ²)·sin(ω_d t + acos ζ): overshoot
	// M_p = exp(−ζπ/√(1−ζ²)) = 16.3 % at ζ = 0.5, peak time π/ω_d, 2 %
	// settling ≈ 4/(ζω_n) (Ogata §5-3 / Dorf & Bishop).
	zeta, wn := 0.5, 10.0
	wd := wn * math.Sqrt(1-zeta*zeta)
	y := func(t float64) float64 {
		return 1 - math.Exp(-zeta*wn*t)/math.Sqrt(1-zeta*zeta)*math.Sin(wd*t+math.Acos(zeta))
	}
	tr := sampled(5000, 0.0005, y)
	m, err := Analyze(tr, 0, 1, DefaultBand)
	if err != nil {
		t.Fatal(err)
	}
	mp := math.Exp(-zeta * math.Pi / math.Sqrt(1-zeta*zeta))
	if !near(m.Overshoot, mp, 1e-4) || !near(m.Overshoot, 0.163, 0.005) {
		t.Errorf("overshoot %.5f, want %.5f", m.Overshoot, mp)
	}
	if !near(m.PeakTime, math.Pi/wd, 2e-3) {
		t.Errorf("peak time %.5f, want %.5f", m.PeakTime, math.Pi/wd)
	}
	// 4/(ζω_n) is the envelope estimate; the exact 2 % time of this trace
	// lies within 10 % of it.
	if !m.Settled || !near(m.Settling, 4/(zeta*wn), 0.10) {
		t.Errorf("settling %.4f s, want ≈ %.4f", m.Settling, 4/(zeta*wn))
	}
	// And exactly: after Settling every point is in the band, just before it is not.
	for _, p := range tr {
		if p.T > m.Settling+1e-9 && math.Abs(p.V-1) > DefaultBand {
			t.Fatalf("point at %.4f s outside band after settling %.4f", p.T, m.Settling)
		}
	}
}

func TestAnalyzeErrorsAndEdges(t *testing.T) {
	good := []Point{{0, 0}, {1, 1}}
	if _, err := Analyze(good, 1, 1, 0); err != ErrNoStep {
		t.Errorf("no step: %v", err)
	}
	if _, err := Analyze(good[:1], 0, 1, 0); err == nil {
		t.Error("one point accepted")
	}
	if _, err := Analyze([]Point{{0, 0}, {0, 1}}, 0, 1, 0); err == nil {
		t.Error("non-increasing time accepted")
	}
	// Never reaching 90 %: T90 NaN, not settled.
	m, err := Analyze([]Point{{0, 0}, {1, 0.5}, {2, 0.6}}, 0, 1, 0)
	if err != nil || !math.IsNaN(m.T90) || m.Settled || !near(m.T50, 1, 1e-12) {
		t.Errorf("%+v %v", m, err)
	}
}

func BenchmarkAnalyze(b *testing.B) {
	tr := sampled(1000, 0.002, func(t float64) float64 { return 1 - math.Exp(-t/0.3) })
	b.ReportAllocs()
	for b.Loop() {
		if _, err := Analyze(tr, 0, 1, 0); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(len(tr)), "ns/sample")
}
