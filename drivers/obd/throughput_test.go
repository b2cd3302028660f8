package obd_test

import (
	"context"
	"sync/atomic"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/sim"
)

// Throughput rig: a 500 kbit/s virtual bus, the simulated ECU answering 5 ms
// after each request, and six fast channels.
const (
	tpBitRate      = 500_000
	tpResponseTime = 5 * time.Millisecond
)

var tpChannels = []struct {
	name string
	pid  obd.PID
}{
	{"ecu_engine_speed", 0x0C},
	{"ecu_manifold_pressure", 0x0B},
	{"ecu_throttle_position", 0x11},
	{"ecu_intake_air_temperature", 0x0F},
	{"ecu_o2_s1_lambda_v", 0x24},
	{"ecu_timing_advance", 0x0E},
}

func tpRig(b *testing.B, clk clock.Clock) (*can.VirtualBus, *obdcan.Transport, sim.State) {
	b.Helper()
	eng := sim.NewShared(sim.NewEngine(sim.DefaultParams()))
	st := eng.Step(20 * time.Second)
	rig, err := sim.NewRig(context.Background(), sim.RigConfig{Bus: can.VirtualConfig{BitRate: tpBitRate, Clock: clk},
		ECU: sim.ECUConfig{Source: eng.State, ResponseTime: tpResponseTime}})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { _ = rig.Close() })
	tr, err := obdcan.New(rig.Node(), obd.ID11)
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { _ = tr.Close() })
	return rig.Bus, tr, st
}

// exchangeWireTime is the wire time of one exchange of our pattern: the
// request SF, then the response to all six PIDs as FF + FC + CFs, every
// frame padded to DLC 8, with the stuffing the virtual bus counts.
func exchangeWireTime(b *testing.B, st sim.State) (time.Duration, int) {
	b.Helper()
	respLen := 1 // 0x41
	for _, c := range tpChannels {
		n, ok := obd.PIDLength(c.pid)
		if !ok {
			b.Fatalf("PID 0x%02X unknown", uint8(c.pid))
		}
		respLen += 1 + n
	}
	frame := func(id uint32, d ...byte) can.Frame {
		f := can.Frame{ID: id, DLC: 8, Data: [8]byte{0xCC, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC}}
		copy(f.Data[:], d)
		return f
	}
	var stuffing can.Stuffing // the zero VirtualConfig.Stuffing: can.StuffActual
	wire := func(f can.Frame) time.Duration { return can.FrameDuration(f, tpBitRate, stuffing) }
	req := []byte{7, 0x01}
	for _, c := range tpChannels {
		req = append(req, byte(c.pid))
	}
	// Representative response bytes: the real encoding is state-dependent;
	// stuff bits vary by a few per frame.
	resp := make([]byte, respLen)
	resp[0] = 0x41
	total := wire(frame(0x7E0, req...))
	total += wire(frame(0x7E8, append([]byte{0x10, byte(respLen)}, resp[:6]...)...))
	total += wire(frame(0x7E0, 0x30, 0, 0))
	frames := 3
	sn := byte(1)
	for off := 6; off < respLen; off += 7 {
		total += wire(frame(0x7E8, append([]byte{0x20 | sn}, resp[off:min(off+7, respLen)]...)...))
		sn++
		frames++
	}
	return total, frames
}

// BenchmarkPollerThroughput compares our Poller's multi-PID polling with the
// usual one-PID-per-functional-request loop on the same bus and ECU, and with
// the theoretical limit of our exchange pattern.
//
// clock=precise times the virtual bus's frames and the ECU's response time
// with clock.Precise, so the rig runs at the modelled speed; clock=system
// uses Go's timers, which here wake up to ~1 ms late and so stretch every
// 0.25 ms frame: it measures the rig's timer overhead as much as the Poller.
func BenchmarkPollerThroughput(b *testing.B) {
	b.Run("clock=precise", func(b *testing.B) { throughput(b, clock.Precise{}) })
	b.Run("clock=system", func(b *testing.B) { throughput(b, nil) })
}

func throughput(b *testing.B, clk clock.Clock) {
	_, tr, st := tpRig(b, clk)
	wire, frames := exchangeWireTime(b, st)
	limit := float64(len(tpChannels)) / (wire + tpResponseTime).Seconds()

	// Ours: the Poller, every channel always due.
	var n atomic.Int64
	target := int64(b.N) + 60 // 60 readings of warm-up (discovery, bitmaps)
	done := make(chan time.Time, 1)
	var start atomic.Int64
	cs := make([]obd.PollChannel, len(tpChannels))
	for i, c := range tpChannels {
		cs[i] = obd.PollChannel{Name: c.name, Interval: time.Millisecond}
	}
	p, err := obd.NewPoller(obd.Config{Transport: tr, Channels: cs, Emit: func(_ obd.Addr, _ time.Time, rs []obd.Reading) {
		for range rs {
			switch k := n.Add(1); k {
			case 60:
				start.Store(time.Now().UnixNano())
			case target:
				done <- time.Now()
			}
		}
	}})
	if err != nil {
		b.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	ran := make(chan struct{})
	go func() { _ = p.Run(ctx); close(ran) }()
	b.ResetTimer()
	var end time.Time
	select {
	case end = <-done:
	case <-time.After(time.Duration(b.N)*20*time.Millisecond + 10*time.Second):
		b.Fatalf("poller produced %d of %d readings (%+v)", n.Load(), target, p.Stats())
	}
	b.StopTimer()
	cancel()
	<-ran
	ours := float64(b.N) / end.Sub(time.Unix(0, start.Load())).Seconds()
	for _, e := range p.Stats().ECUs {
		if e.MultiPID != obd.MultiYes || e.Timeouts != 0 {
			b.Fatalf("poller did not run multi-PID cleanly: %+v", e)
		}
	}

	// Usual: one PID per functional request, next request on the first
	// answer, on a fresh rig so no late answer to the Poller is in the way.
	_, tr2, _ := tpRig(b, clk)
	usual := usualLoop(b, tr2, b.N)

	b.ReportMetric(ours, "readings/s")
	b.ReportMetric(usual, "usual_readings/s")
	b.ReportMetric(limit, "limit_readings/s")
	b.ReportMetric(ours/usual, "x_usual")
	b.ReportMetric(100*ours/limit, "%_of_limit")
	b.ReportMetric(float64(wire.Microseconds()), "wire_µs/exchange")
	b.ReportMetric(float64(frames), "frames/exchange")
}

// usualLoop polls the six PIDs in turn, one functional request each, and
// sends the next request as soon as the first answer arrives. It returns
// readings per second over n readings.
func usualLoop(b *testing.B, tr *obdcan.Transport, n int) float64 {
	b.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Duration(n)*20*time.Millisecond+10*time.Second)
	defer cancel()
	to := obd.FunctionalAddr(obd.ID11)
	reqs := make([]obd.Request, len(tpChannels))
	for i, c := range tpChannels {
		reqs[i], _ = obd.CurrentData(c.pid)
	}
	got := 0
	var start time.Time
	for i := 0; got < n; i++ {
		if i == len(tpChannels) { // one round of warm-up
			start = time.Now()
			got = 0
		}
		want := tpChannels[i%len(tpChannels)].pid
		if err := tr.Send(ctx, to, reqs[i%len(reqs)]); err != nil {
			b.Fatal(err)
		}
		m, err := tr.Receive(ctx)
		if err != nil {
			b.Fatal(err)
		}
		r, err := obd.ParseResponse(m.Payload)
		if err != nil || r.Negative || len(r.Data) == 0 || obd.PID(r.Data[0]) != want {
			b.Fatalf("answer % X to %v (%v)", m.Payload, reqs[i%len(reqs)], err)
		}
		if err := obd.DecodeCurrentData(r.Data, func(obd.PID, obd.ChannelIndex, float64) {}); err != nil {
			b.Fatal(err)
		}
		got++
	}
	return float64(n) / time.Since(start).Seconds()
}
