package main

import (
	"context"
	"encoding/json"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
)

// TestDemoDetectors runs one whole drive cycle in real time and checks what the
// detectors make of it: lag events with plausible figures, the lean moment
// raising and clearing one warning without flicker, the cold rev tripping the
// warm-up guard, and the cool-down timer counting down at hot idle.
func TestDemoDetectors(t *testing.T) {
	if testing.Short() {
		t.Skip("runs a whole 60 s drive cycle")
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	httpAddr, mqttAddr, done := startDemo(t, ctx, 1, func(c *config.Config) { c.StateDir = t.TempDir() })

	var mu sync.Mutex
	var events []mqttpub.EventPayload
	c := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + mqttAddr).SetClientID("detectors"))
	if tok := c.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	defer c.Disconnect(100)
	c.Subscribe("plenum/brackenfell-rs/events", 1, func(_ paho.Client, m paho.Message) {
		var e mqttpub.EventPayload
		if err := json.Unmarshal(m.Payload(), &e); err == nil {
			mu.Lock()
			events = append(events, e)
			mu.Unlock()
		}
	}).WaitTimeout(5 * time.Second)

	var remaining []float64
	end := time.Now().Add(sim.CycleLength() + time.Second)
	for time.Now().Before(end) {
		fams, _ := scrape(t, httpAddr)
		if testing.Verbose() {
			th, _ := gauge(fams, "plenum_temperature_celsius", "turbo_thermal_model")
			egt, _ := gauge(fams, "plenum_temperature_celsius", "exhaust")
			t.Logf("thermal %.0f egt %.0f", th, egt)
		}
		if v, ok := gauge(fams, "plenum_cooldown_idle_remaining_seconds", "turbo_guard"); ok {
			remaining = append(remaining, v)
		}
		time.Sleep(200 * time.Millisecond)
	}
	cancel()
	<-done

	mu.Lock()
	defer mu.Unlock()
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
