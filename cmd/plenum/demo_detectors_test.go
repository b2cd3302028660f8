package main

import (
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
)

// TestDemoDetectors runs one whole drive cycle in simulated time and checks
// what the detectors make of it: lag events with plausible figures, the lean
// moment raising and clearing one warning without flicker, the cold rev
// tripping the warm-up guard, and the cool-down timer counting down at hot
// idle.
func TestDemoDetectors(t *testing.T) {
	_, s := demoSimulated(t, 100)
	remID, ok := s.reg.Lookup("cooldown_idle_remaining")
	if !ok {
		t.Fatal("no cooldown_idle_remaining channel")
	}
	var events []pipeline.Event
	var remaining []float64
	var buf []pipeline.Sample
	t0 := time.Unix(1_800_000_000, 0)
	nextLook := t0
	s.run(t0, sim.CycleLength()+time.Second, 10*time.Millisecond, func(now time.Time) {
		buf, events = s.sub.Drain(buf[:0], events)
		if now.Before(nextLook) {
			return
		}
		nextLook = now.Add(200 * time.Millisecond) // as a scraper every 200 ms would
		if v := s.p.Store().Get(remID); v.Set && v.Fresh(now, 2*time.Second) {
			remaining = append(remaining, v.Value)
		}
	})
	var lags, leanRaised, leanCleared, coldRaised int
	for _, e := range events {
		switch {
		case e.Kind == "turbo_lag":
			lags++
			t90 := e.Fields["t90_seconds"]
			// Plausible for the demo turbo (a 450 ms spool lag behind a
			// throttle ramp): between 0.3 and 5 s to 90 % of the rise.
			if t90 < 0.3 || t90 > 5 || e.Fields["t10_seconds"] > e.Fields["t50_seconds"] || e.Fields["t50_seconds"] > t90 {
				t.Errorf("implausible lag event: %+v", e.Fields)
			}
		case e.Kind == "warning_raised" && e.Name == "lean_under_boost":
			leanRaised++
		case e.Kind == "warning_cleared" && e.Name == "lean_under_boost":
			leanCleared++
		case e.Kind == "warning_raised" && e.Name == "cold_engine_high_load":
			coldRaised++
		}
	}
	t.Logf("%d lag events, lean raised %d cleared %d, cold raised %d, %d cool-down readings", lags, leanRaised, leanCleared, coldRaised, len(remaining))
	if lags < 2 {
		t.Errorf("%d lag events, want one per pull (2)", lags)
	}
	if leanRaised != 1 || leanCleared != 1 {
		t.Errorf("lean_under_boost raised %d and cleared %d times, want once each (no flicker)", leanRaised, leanCleared)
	}
	if coldRaised < 1 {
		t.Errorf("the cold rev did not trip the warm-up guard")
	}
	// The timer counts down while idling hot: a run of strictly falling values.
	falling := 0
	for i := 1; i < len(remaining); i++ {
		if remaining[i] < remaining[i-1] && remaining[i] > 0 {
			falling++
		}
	}
	if falling < 5 {
		t.Errorf("cool-down remaining did not count down: %v", remaining)
	}
}
