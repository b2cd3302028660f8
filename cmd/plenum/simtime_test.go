package main

import (
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
)

// processNow is a sink that runs each frame through the pipeline at once,
// on the caller's goroutine: simulated time needs no ingest loop.
type processNow struct{ p *pipeline.Pipeline }

func (s processNow) PutFrame(ss []pipeline.Sample) bool { s.p.ProcessFrame(ss); return true }

// simulated is a demo configuration's serial source, derivations and
// detectors driven by the simulated engine in simulated time: each frame the
// simulated microcontroller would send is encoded, decoded by the real
// decoder and processed as one frame, with no real waiting and no
// pseudo-terminal. The ECU over CAN is left out (its poller runs on real
// timers).
type simulated struct {
	reg   *pipeline.Registry
	p     *pipeline.Pipeline
	sub   *pipeline.Subscription
	frame func(now time.Time)
}

func newSimulated(t testing.TB, cfg *config.Config) *simulated {
	t.Helper()
	cfg.CAN = nil
	reg := pipeline.NewRegistry()
	dec, _, err := cfg.Serial[0].Decoder(0, reg)
	if err != nil {
		t.Fatal(err)
	}
	ds, _, err := buildAll(cfg, reg)
	if err != nil {
		t.Fatal(err)
	}
	g, err := pipeline.BuildGraph(reg, ds)
	if err != nil {
		t.Fatal(err)
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	p.BindEmitters()
	s := &simulated{reg: reg, p: p, sub: p.Subscribe("all", 1<<20)}
	params := sim.DefaultParams()
	if cfg.Sim.Seed != 0 {
		params.Seed = cfg.Sim.Seed
	}
	eng := sim.NewEngine(params)
	lines := sim.Lines{Sensors: sim.DemoSensors()}
	var start time.Time
	period := time.Duration(float64(time.Second) / cfg.Sim.FrameRateHz)
	sink := processNow{p}
	s.frame = func(now time.Time) {
		if start.IsZero() {
			start = now
		}
		l := lines.Next(eng.Step(period), uint32(now.Sub(start)/time.Millisecond))
		if err := dec.Line(l[:len(l)-1], now, sink); err != nil {
			t.Fatalf("the simulated microcontroller's line does not decode: %v", err)
		}
	}
	return s
}

// run advances simulated time from t0 by d, one frame period at a time,
// calling visit (if not nil) after every frame.
func (s *simulated) run(t0 time.Time, d, period time.Duration, visit func(now time.Time)) {
	for now := t0; now.Sub(t0) < d; now = now.Add(period) {
		s.frame(now)
		if visit != nil {
			visit(now)
		}
	}
}

// demoSimulated parses the embedded demo configuration at the given frame
// rate for a simulated run.
func demoSimulated(t testing.TB, frameRate float64) (*config.Config, *simulated) {
	cfg, err := config.Parse("demo.yaml", demoConfig)
	if err != nil {
		t.Fatal(err)
	}
	cfg.Sim.FrameRateHz = frameRate
	cfg.StateDir = ""
	return cfg, newSimulated(t, cfg)
}

// A whole demo cycle, frame by frame as the microcontroller sends them,
// writes one value per channel and instant: no (channel, time) key twice.
func TestSimulatedCycleHasNoDuplicateKeys(t *testing.T) {
	_, s := demoSimulated(t, 100)
	type key struct {
		ch pipeline.ChannelID
		t  int64
	}
	seen := map[key]int{}
	var buf []pipeline.Sample
	derivedSeen := 0
	s.run(time.Unix(1_800_000_000, 0), sim.CycleLength(), 10*time.Millisecond, func(time.Time) {
		buf, _ = s.sub.Drain(buf[:0], nil)
		for _, x := range buf {
			seen[key{x.Channel, x.Time.UnixNano()}]++
			if s.reg.Channel(x.Channel).Origin == pipeline.FromDerived {
				derivedSeen++
			}
		}
	})
	dups := 0
	for k, n := range seen {
		if n > 1 {
			if dups < 5 {
				t.Errorf("%s at %d written %d times", s.reg.Channel(k.ch).Name, k.t, n)
			}
			dups += n - 1
		}
	}
	if dups > 0 || s.sub.Dropped() > 0 {
		t.Errorf("%d duplicate keys, %d samples dropped", dups, s.sub.Dropped())
	}
	if derivedSeen < 6000 {
		t.Errorf("only %d derived samples in a whole cycle", derivedSeen)
	}
}
