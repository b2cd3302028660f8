package obdcan_test

import (
	"context"
	"math"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
)

// frames records every PutFrame call, copying the reused slice.
type frames struct {
	mu sync.Mutex
	f  [][]pipeline.Sample
}

func (r *frames) PutFrame(ss []pipeline.Sample) bool {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.f = append(r.f, append([]pipeline.Sample(nil), ss...))
	return true
}

func (r *frames) snapshot() [][]pipeline.Sample {
	r.mu.Lock()
	defer r.mu.Unlock()
	return append([][]pipeline.Sample(nil), r.f...)
}

// TestSourceOneFramePerAnswer runs a Source against the simulated ECU: the
// channels are registered under the source's name, each answer reaches the
// sink as one frame with one time, the values agree with the engine within
// half a J1979 count, and Report says up with the poller's counters.
func TestSourceOneFramePerAnswer(t *testing.T) {
	st := pullState(t)
	rg := newRig(t, sim.ECUConfig{Source: func() sim.State { return st }, ResponseTime: 2 * time.Millisecond})
	reg := pipeline.NewRegistry()
	cfg := obdcan.Config{Name: "ecu_sim", Format: obd.ID11}
	for _, e := range expects {
		cfg.Channels = append(cfg.Channels, obdcan.Channel{Name: e.name, RateHz: 50})
	}
	src, err := obdcan.NewSource(rg.Node(), reg, cfg)
	if err != nil {
		t.Fatal(err)
	}
	if src.Name() != "ecu_sim" {
		t.Errorf("Name %q", src.Name())
	}
	if r := src.Report(); r.Up || r.Kind != "source" || r.Name != "ecu_sim" {
		t.Errorf("report before Run: %+v", r)
	}
	want := map[pipeline.ChannelID]expect{}
	for _, e := range expects {
		id, ok := reg.Lookup(e.name)
		if !ok {
			t.Fatalf("%s not registered", e.name)
		}
		if c := reg.Channel(id); c.Source != "ecu_sim" || c.Sensor != e.name || c.MaxAge != time.Second {
			t.Errorf("%s registered as %+v", e.name, c)
		}
		want[id] = e
	}
	var sink frames
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- src.Run(ctx, &sink) }()
	seen := map[pipeline.ChannelID]int{}
	deadline := time.Now().Add(5 * time.Second)
	for len(seen) < len(expects) || !src.Report().Up {
		if time.Now().After(deadline) {
			t.Fatalf("after 5 s: %d of %d channels seen, report %+v", len(seen), len(expects), src.Report())
		}
		time.Sleep(5 * time.Millisecond)
		for _, f := range sink.snapshot() {
			for _, s := range f {
				seen[s.Channel]++
			}
		}
	}
	up := src.Report()
	cancel()
	if err := <-done; err != context.Canceled {
		t.Errorf("Run returned %v", err)
	}
	fs := sink.snapshot()
	multi, total := 0, 0
	for _, f := range fs {
		if len(f) == 0 {
			t.Fatal("empty frame")
		}
		if len(f) > 1 {
			multi++
		}
		for _, s := range f {
			total++
			if !s.Time.Equal(f[0].Time) {
				t.Fatalf("one frame, two times: %v and %v", f[0].Time, s.Time)
			}
			e, ok := want[s.Channel]
			if !ok {
				t.Fatalf("sample of unregistered channel %d", s.Channel)
			}
			if w := e.want(st); math.Abs(s.Value-w) > e.res/2+1e-9 {
				t.Errorf("%s = %v, engine %v (resolution %v)", e.name, s.Value, w, e.res)
			}
		}
	}
	if multi == 0 {
		t.Error("no frame carried more than one reading: multi-PID answers were split")
	}
	if !up.Up {
		t.Errorf("not up while reading: %+v", up)
	}
	final := src.Report()
	if final.Up {
		t.Error("still up after Run returned")
	}
	if n, _ := final.Counter("readings"); n != uint64(total) {
		t.Errorf("readings counter %d, sink got %d samples", n, total)
	}
	for _, name := range []string{"requests", "responses"} {
		if n, _ := final.Counter(name); n == 0 {
			t.Errorf("%s counter is 0", name)
		}
	}
	for _, name := range []string{"timeouts", "negative_responses", "receive_errors"} {
		if _, ok := final.Counter(name); !ok {
			t.Errorf("counter %s missing", name)
		}
	}
}

func TestNewSourceRejects(t *testing.T) {
	b, err := can.NewVirtualBus(can.VirtualConfig{})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	reg := pipeline.NewRegistry()
	for _, tc := range []struct {
		name string
		cfg  obdcan.Config
		reg  obdcan.Registry
		want string
	}{
		{"unknown channel", obdcan.Config{Name: "a", Channels: []obdcan.Channel{{Name: "ecu_nope", RateHz: 1}}}, reg, `unknown OBD channel "ecu_nope"`},
		{"zero rate", obdcan.Config{Name: "b", Channels: []obdcan.Channel{{Name: "ecu_engine_speed"}}}, reg, "rate"},
		{"no channels", obdcan.Config{Name: "c"}, reg, "nothing to poll"},
		{"bad format", obdcan.Config{Name: "d", Format: 9, Channels: []obdcan.Channel{{Name: "ecu_engine_speed", RateHz: 1}}}, reg, "format"},
		{"priority", obdcan.Config{Name: "e", Channels: []obdcan.Channel{{Name: "ecu_engine_speed", RateHz: 1, Priority: 10}}}, reg, "Priority"},
		{"nil registry", obdcan.Config{Name: "f", Channels: []obdcan.Channel{{Name: "ecu_engine_speed", RateHz: 1}}}, nil, "registry"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := obdcan.NewSource(b.NewNode(), tc.reg, tc.cfg)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("err = %v, want one containing %q", err, tc.want)
			}
		})
	}
}
