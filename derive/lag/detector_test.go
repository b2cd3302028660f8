package lag

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"
)

var t0 = time.Date(2026, 5, 1, 12, 0, 0, 0, time.UTC)

// run drives a detector with a synthetic tip-in at 1 s: throttle 0.1 → 1.0
// over 100 ms, boost a first-order lag (τ) after a dead time, from 100 kPa
// to 200 kPa absolute. lift, if positive, closes the throttle at that time.
// It returns the events seen.
type scenario struct {
	tau, dead, lift, noise, rampDur float64
	dur                             float64
	dt                              float64
}

func (s scenario) run(t *testing.T, d *Detector) []Event {
	t.Helper()
	rng := rand.New(rand.NewPCG(1, 2))
	var evs []Event
	if s.rampDur == 0 {
		s.rampDur = 0.1
	}
	if s.dt == 0 {
		s.dt = 0.01
	}
	n := int(s.dur / s.dt)
	for i := 0; i <= n; i++ {
		tt := float64(i) * s.dt
		thr := 0.1
		if tt > 1 {
			thr = math.Min(1, 0.1+0.9*(tt-1)/s.rampDur)
		}
		if s.lift > 0 && tt >= s.lift {
			thr = 0.2
		}
		boost := 100000.0
		if tt > 1+s.dead {
			boost += 100000 * (1 - math.Exp(-(tt-1-s.dead)/s.tau))
		}
		boost += s.noise * (2*rng.Float64() - 1)
		ev, ok := d.Update(t0.Add(time.Duration(tt*1e9)), thr, boost, 2500+tt, 3)
		if ok {
			evs = append(evs, ev)
		}
	}
	return evs
}

func TestDetectorTargetMode(t *testing.T) {
	d, err := NewDetector(Config{Target: 200000})
	if err != nil {
		t.Fatal(err)
	}
	s := scenario{tau: 0.5, dead: 0.3, dur: 8}
	evs := s.run(t, d)
	if len(evs) != 1 || evs[0].Discarded {
		t.Fatalf("events %+v", evs)
	}
	e := evs[0]
	if !e.Start.Equal(t0.Add(time.Second)) || e.RPM != 2501 || e.Gear != 3 || e.Initial != 100000 || !e.FromTarget {
		t.Errorf("start %v rpm %v gear %v initial %v", e.Start, e.RPM, e.Gear, e.Initial)
	}
	// First-order lag after a dead time (analytic): T50 = dead + τ·ln 2,
	// rise 10–90 % = τ·ln 9, 2 % settling = dead + τ·ln 50. Sampling at
	// 100 Hz with linear interpolation is good to a fraction of a percent.
	if !near(e.T50, s.dead+s.tau*math.Ln2, 0.005) {
		t.Errorf("T50 %.4f, want %.4f", e.T50, s.dead+s.tau*math.Ln2)
	}
	if !near(e.Rise, s.tau*math.Log(9), 0.005) {
		t.Errorf("rise %.4f, want %.4f", e.Rise, s.tau*math.Log(9))
	}
	if !near(e.Settling, s.dead+s.tau*math.Log(50), 0.005) {
		t.Errorf("settling %.4f, want %.4f", e.Settling, s.dead+s.tau*math.Log(50))
	}
	// The event ends SettleHold after entering the band.
	if got := e.End.Sub(e.Start).Seconds(); got < e.Settling+1 || got > e.Settling+1.02 {
		t.Errorf("ended %.3f s after start", got)
	}
}

func TestDetectorSettledLevelWithNoise(t *testing.T) {
	d, err := NewDetector(Config{})
	if err != nil {
		t.Fatal(err)
	}
	// ±300 Pa noise on a 100 kPa step.
	s := scenario{tau: 0.4, dead: 0.2, dur: 10, noise: 300}
	evs := s.run(t, d)
	if len(evs) != 1 || evs[0].Discarded {
		t.Fatalf("events %+v", evs)
	}
	e := evs[0]
	if e.FromTarget || !near(e.Final, 200000, 0.01) {
		t.Errorf("settled level %v", e.Final)
	}
	if !near(e.Rise, s.tau*math.Log(9), 0.05) || !near(e.T50, s.dead+s.tau*math.Ln2, 0.03) {
		t.Errorf("rise %.4f T50 %.4f", e.Rise, e.T50)
	}
}

func TestDetectorLiftOff(t *testing.T) {
	d, _ := NewDetector(Config{Target: 200000})
	evs := scenario{tau: 0.5, dead: 0.3, dur: 5, lift: 1.6}.run(t, d)
	if len(evs) != 1 || !evs[0].Discarded || evs[0].Reason != ReasonLiftOff {
		t.Fatalf("events %+v", evs)
	}
	if got := evs[0].End.Sub(t0).Seconds(); math.Abs(got-1.6) > 0.011 {
		t.Errorf("discarded at %.3f s", got)
	}
}

func TestDetectorSlowOpeningIgnored(t *testing.T) {
	// 0.1 → 1.0 over 2 s is 0.45 /s, below the 2 /s rate: no tip-in.
	d, _ := NewDetector(Config{})
	if evs := (scenario{tau: 0.5, dead: 0.3, dur: 8, rampDur: 2}).run(t, d); len(evs) != 0 {
		t.Fatalf("events %+v", evs)
	}
}

func TestDetectorTimeoutAndNoRise(t *testing.T) {
	// Target never reached: boost stops at 200 kPa, target 300 kPa.
	d, _ := NewDetector(Config{Target: 300000, MaxDuration: 3 * time.Second})
	evs := scenario{tau: 0.3, dead: 0.1, dur: 6}.run(t, d)
	if len(evs) != 1 || evs[0].Reason != ReasonTimeout {
		t.Fatalf("events %+v", evs)
	}
	// No boost at all (a naturally aspirated or stuck wastegate case).
	d, _ = NewDetector(Config{MaxDuration: 2 * time.Second})
	evs = scenario{tau: 0.3, dead: 100, dur: 6}.run(t, d)
	if len(evs) != 1 || evs[0].Reason != ReasonNoRise {
		t.Fatalf("events %+v", evs)
	}
}

func TestDetectorThinning(t *testing.T) {
	// A 16-point buffer at 1 kHz sampling still measures the response.
	d, _ := NewDetector(Config{Target: 200000, Capacity: 16})
	evs := scenario{tau: 0.5, dead: 0.3, dur: 6, dt: 0.001}.run(t, d)
	if len(evs) != 1 || evs[0].Discarded {
		t.Fatalf("events %+v", evs)
	}
	if !near(evs[0].Rise, 0.5*math.Log(9), 0.25) {
		t.Errorf("rise %v", evs[0].Rise)
	}
}

func TestDetectorBadInput(t *testing.T) {
	d, _ := NewDetector(Config{Target: 200000})
	d.Update(t0, 0.1, 100000, 2000, 2)
	d.Update(t0.Add(10*time.Millisecond), 1, 100000, 2000, 2)
	ev, ok := d.Update(t0.Add(20*time.Millisecond), 1, math.NaN(), 2000, 2)
	if !ok || ev.Reason != ReasonBadInput {
		t.Fatalf("%+v %v", ev, ok)
	}
	// Time going backwards is ignored, not an error.
	if _, ok := d.Update(t0, 0.1, 100000, 2000, 2); ok {
		t.Fatal("event from a stale sample")
	}
}

func TestConfigValidate(t *testing.T) {
	bad := []Config{
		{TipInRate: -1}, {MinThrottle: 1.5}, {LiftOff: 0.95}, {Band: 0.7},
		{MaxDuration: time.Millisecond}, {MinStep: -1}, {Capacity: 4}, {Target: math.Inf(1)},
	}
	for _, c := range bad {
		if _, err := NewDetector(c); err == nil {
			t.Errorf("%+v accepted", c)
		}
	}
}

func TestDetectorNoAllocs(t *testing.T) {
	d, _ := NewDetector(Config{})
	i := 0
	allocs := testing.AllocsPerRun(5000, func() {
		feedCycle(d, i)
		i++
	})
	if allocs != 0 {
		t.Fatalf("%v allocs per sample", allocs)
	}
}

// feedCycle feeds sample i of a repeating 6 s tip-in cycle at 100 Hz and
// reports whether an event came out.
func feedCycle(d *Detector, i int) bool {
	k := i % 600
	tt := float64(k) * 0.01
	thr, boost := 0.1, 100000.0
	if tt > 1 && tt < 5 {
		thr = math.Min(1, 0.1+9*(tt-1))
		boost += 100000 * (1 - math.Exp(-(tt-1)/0.4))
	}
	_, ok := d.Update(t0.Add(time.Duration(i)*10*time.Millisecond), thr, boost, 3000, 3)
	return ok
}

func BenchmarkDetector(b *testing.B) {
	d, _ := NewDetector(Config{})
	events := 0
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		if feedCycle(d, i) {
			events++
		}
		i++
	}
	if events == 0 {
		b.Fatal("no events")
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/sample")
}
