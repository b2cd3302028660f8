package obdcan

import (
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/pipeline"
)

type countSink struct{ frames, samples int }

func (c *countSink) PutFrame(ss []pipeline.Sample) bool {
	c.frames++
	c.samples += len(ss)
	return true
}

// TestReportUpWindow drives the injected clock: the source is up while the
// last reading is less than UpWindow old, and only while it runs.
func TestReportUpWindow(t *testing.T) {
	b, err := can.NewVirtualBus(can.VirtualConfig{})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	clk := clock.NewManual(time.Unix(1_700_000_000, 0))
	s, err := NewSource(b.NewNode(), pipeline.NewRegistry(), Config{Name: "ecu", Clock: clk,
		Channels: []Channel{{Name: "ecu_engine_speed", RateHz: 10}, {Name: "ecu_manifold_pressure", RateHz: 10}}})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	rpm, _, _ := obd.LookupChannel("ecu_engine_speed")
	mapCh, _, _ := obd.LookupChannel("ecu_manifold_pressure")
	iat, _, _ := obd.LookupChannel("ecu_intake_air_temperature") // not polled: dropped
	var sink countSink
	s.sink = &sink
	s.running.Store(true)
	if s.Report().Up {
		t.Fatal("up before any reading")
	}
	s.emit(obd.Addr{}, clk.Now(), []obd.Reading{{Channel: rpm, Value: 800}, {Channel: iat, Value: 20}, {Channel: mapCh, Value: 35000}})
	if sink.frames != 1 || sink.samples != 2 {
		t.Fatalf("sink got %d frames, %d samples; want 1, 2", sink.frames, sink.samples)
	}
	for _, step := range []struct {
		advance time.Duration
		running bool
		up      bool
	}{
		{0, true, true},
		{UpWindow - time.Millisecond, true, true},
		{time.Millisecond, true, false}, // exactly UpWindow old
		{time.Hour, true, false},
	} {
		clk.Advance(step.advance)
		s.running.Store(step.running)
		if got := s.Report().Up; got != step.up {
			t.Errorf("%v after the reading: up %v, want %v", clk.Now().Sub(time.Unix(1_700_000_000, 0)), got, step.up)
		}
	}
	s.emit(obd.Addr{}, clk.Now(), []obd.Reading{{Channel: rpm, Value: 900}})
	if !s.Report().Up {
		t.Error("not up after a fresh reading")
	}
	s.running.Store(false)
	if s.Report().Up {
		t.Error("up while not running")
	}
	if n, _ := s.Report().Counter("readings"); n != 3 {
		t.Errorf("readings %d, want 3", n)
	}
	for _, name := range []string{"isotp_aborted_receptions", "isotp_interrupted_receptions", "isotp_dropped_messages", "isotp_unexpected_flow_controls"} {
		if _, ok := s.Report().Counter(name); !ok {
			t.Errorf("the report lacks the ISO-TP counter %s", name)
		}
	}
}
