package turbo

import (
	"math"
	"testing"
	"time"
)

var t0 = time.Date(2026, 5, 1, 7, 0, 0, 0, time.UTC)

func sec(s float64) time.Time { return t0.Add(time.Duration(s * 1e9)) }

func TestWarmUpGuard(t *testing.T) {
	w, err := NewWarmUp(WarmUpConfig{})
	if err != nil {
		t.Fatal(err)
	}
	if s := w.Update(sec(0), 0, 0, 20); s.Running || s.Warning {
		t.Fatalf("engine off: %+v", s)
	}
	// Started at 1 s, cold oil: revving or boosting warns, idling does not.
	w.Update(sec(1), 900, 0, 20)
	if s := w.Update(sec(2), 4000, 0, 20); !s.Warning || s.Reason != ReasonColdRPM || s.SinceStart != time.Second {
		t.Fatalf("cold rev: %+v", s)
	}
	if s := w.Update(sec(3), 3000, 60000, 20); !s.Warning || s.Reason != ReasonColdBoost {
		t.Fatalf("cold boost: %+v", s)
	}
	if s := w.Update(sec(4), 3000, 40000, 20); s.Warning || s.Warm {
		t.Fatalf("within limits: %+v", s)
	}
	// Oil warm at 20 s but the minimum time (30 s) not yet run.
	if s := w.Update(sec(20), 4000, 0, 65); !s.Warning || s.Warm {
		t.Fatalf("warm oil before min time: %+v", s)
	}
	if s := w.Update(sec(31), 4000, 100000, 65); s.Warning || !s.Warm {
		t.Fatalf("warm: %+v", s)
	}
	// Stays warm while running even if the oil reading dips.
	if s := w.Update(sec(32), 5000, 100000, 58); s.Warning || !s.Warm {
		t.Fatalf("dip: %+v", s)
	}
	// A stop resets; a hot restart still waits the minimum time.
	w.Update(sec(40), 0, 0, 70)
	w.Update(sec(41), 900, 0, 70)
	if s := w.Update(sec(42), 4000, 0, 70); !s.Warning {
		t.Fatalf("hot restart: %+v", s)
	}
	if s := w.Update(sec(71), 4000, 0, 70); s.Warning {
		t.Fatalf("hot restart after min time: %+v", s)
	}
}

func TestWarmUpWithoutOilTemperature(t *testing.T) {
	w, _ := NewWarmUp(WarmUpConfig{FallbackTime: time.Minute})
	w.Update(sec(0), 900, 0, math.NaN())
	if s := w.Update(sec(59), 4000, 0, math.NaN()); !s.Warning {
		t.Fatalf("%+v", s)
	}
	if s := w.Update(sec(60), 4000, 0, math.NaN()); s.Warning || !s.Warm {
		t.Fatalf("%+v", s)
	}
}

func TestCoolDownFirstOrder(t *testing.T) {
	// First-order lag toward a constant drive: after one time constant
	// T = D + (T0 − D)·e^(−1) (analytic), whatever the sample interval.
	c, _ := NewCoolDown(CoolDownConfig{Tau: 60 * time.Second})
	const egt = 800.0
	var s CoolDownStatus
	for i := 0; i <= 600; i++ { // 0.1 s steps to 60 s
		s = c.Update(sec(float64(i)*0.1), 4000, egt, 0.1)
	}
	want := egt + (25-egt)*math.Exp(-1)
	if math.Abs(s.Temp-want) > 1e-6 || !s.FromEGT {
		t.Fatalf("T(τ) = %v, want %v", s.Temp, want)
	}
	// Coarse sampling gives the same state (exact discretisation).
	c2, _ := NewCoolDown(CoolDownConfig{Tau: 60 * time.Second})
	c2.Update(sec(0), 4000, egt, 0.1)
	if s2 := c2.Update(sec(60), 4000, egt, 0.1); math.Abs(s2.Temp-want) > 1e-9 {
		t.Fatalf("coarse %v", s2.Temp)
	}
}

func TestCoolDownIdleRemaining(t *testing.T) {
	// Heat soak with a proxy drive, then idle with EGT at the idle drive:
	// the predicted idle time is when the model reaches Safe.
	cfg := CoolDownConfig{}
	c, _ := NewCoolDown(cfg)
	var s CoolDownStatus
	for i := 0; i <= 600; i++ { // 10 min hard driving, 0.15 kg/s, no EGT
		s = c.Update(sec(float64(i)), 5500, math.NaN(), 0.15)
	}
	if s.FromEGT || s.Drive != 850 || s.SafeToSwitchOff || !(s.Temp > 840) {
		t.Fatalf("after a hard run: %+v", s)
	}
	// τ·ln((T − 250)/(350 − 250)) with τ = 60 s (analytic).
	want := 60 * math.Log((s.Temp-250)/100)
	if got := s.IdleRemaining.Seconds(); math.Abs(got-want) > 1e-6 {
		t.Fatalf("idle remaining %v s, want %v", got, want)
	}
	start := 600.0
	var safeAt float64
	for i := 1; i <= 3000; i++ {
		tt := start + float64(i)*0.1
		s = c.Update(sec(tt), 850, 250, 0.01)
		if !s.Idling {
			t.Fatal("not idling at 850 rpm")
		}
		if s.SafeToSwitchOff {
			safeAt = tt - start
			break
		}
	}
	if math.Abs(safeAt-want) > 0.11 || s.IdleRemaining != 0 {
		t.Fatalf("safe after %v s of idle, predicted %v", safeAt, want)
	}
	// Within the 1–3 min range of published general advice (Wikipedia
	// "Turbocharger"): a sanity check of the defaults, common practice.
	if want < 60 || want > 180 {
		t.Fatalf("default idle time after a hard run %v s outside 1–3 min", want)
	}
}

func TestCoolDownProxyMonotonic(t *testing.T) {
	// More air flow, hotter state; capped at MaxDrive.
	temp := func(m float64) float64 {
		c, _ := NewCoolDown(CoolDownConfig{})
		c.Update(sec(0), 3000, math.NaN(), m)
		return c.Update(sec(30), 3000, math.NaN(), m).Temp
	}
	if !(temp(0.02) < temp(0.08)) || !(temp(0.08) < temp(0.15)) || temp(1) != temp(2) {
		t.Fatal("proxy not monotonic or not capped")
	}
}

func TestCoolDownPersistence(t *testing.T) {
	c, _ := NewCoolDown(CoolDownConfig{})
	c.Update(sec(0), 5000, 900, 0.2)
	c.Update(sec(300), 5000, 900, 0.2)
	st := c.State()
	if !st.Time.Equal(sec(300)) || !(st.Temp > 850) {
		t.Fatalf("state %+v", st)
	}
	// Daemon restarts 10 min later: engine-off cooling toward 25 °C with
	// OffTau = 20 min (analytic first-order decay).
	d, _ := NewCoolDown(CoolDownConfig{})
	if err := d.Restore(st, sec(900)); err != nil {
		t.Fatal(err)
	}
	want := 25 + (st.Temp-25)*math.Exp(-600.0/1200)
	if got := d.State().Temp; math.Abs(got-want) > 1e-9 {
		t.Fatalf("restored %v, want %v", got, want)
	}
	if err := d.Restore(CoolDownState{Temp: math.NaN()}, sec(0)); err == nil {
		t.Fatal("NaN state accepted")
	}
}

func TestConfigsValidate(t *testing.T) {
	for _, c := range []CoolDownConfig{{Safe: 200}, {Tau: -time.Second}, {ProxyGain: -1}, {IdleRPM: 300}, {Ambient: math.NaN()}} {
		if _, err := NewCoolDown(c); err == nil {
			t.Errorf("%+v accepted", c)
		}
	}
	for _, c := range []WarmUpConfig{{RPMLimit: 300}, {BoostLimit: -1}, {OilTemp: math.Inf(1)}, {MinTime: -1}} {
		if _, err := NewWarmUp(c); err == nil {
			t.Errorf("%+v accepted", c)
		}
	}
}

func TestNoAllocs(t *testing.T) {
	w, _ := NewWarmUp(WarmUpConfig{})
	c, _ := NewCoolDown(CoolDownConfig{})
	i := 0
	if a := testing.AllocsPerRun(1000, func() {
		w.Update(sec(float64(i)*0.01), 3000, 50000, 70)
		c.Update(sec(float64(i)*0.01), 3000, math.NaN(), 0.05)
		i++
	}); a != 0 {
		t.Fatalf("%v allocs", a)
	}
}

func BenchmarkGuards(b *testing.B) {
	w, _ := NewWarmUp(WarmUpConfig{})
	c, _ := NewCoolDown(CoolDownConfig{})
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		tt := sec(float64(i) * 0.01)
		w.Update(tt, 3000, 50000, 70)
		c.Update(tt, 3000, math.NaN(), 0.05)
		i++
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/sample")
}
