package obd

import (
	"testing"
	"time"
)

// sixPIDResponse is a 6-PID service 01 answer (after the 0x41).
var sixPIDResponse = []byte{0x0C, 0x1A, 0xF8, 0x0D, 0x32, 0x05, 0x5A, 0x0B, 0x65, 0x10, 0x01, 0xF4, 0x78, 0x0F, 0x01, 0x90, 0xFF, 0xFF, 0x00, 0x00, 0x13, 0x88}

func TestDecodeZeroAlloc(t *testing.T) {
	fullPayload := append([]byte{0x41}, sixPIDResponse...)
	var sum float64
	fn := func(_ PID, _ ChannelIndex, v float64) { sum += v }
	allocs := testing.AllocsPerRun(100, func() {
		r, err := ParseResponse(fullPayload)
		if err != nil {
			t.Fatal(err)
		}
		if err := DecodeCurrentData(r.Data, fn); err != nil {
			t.Fatal(err)
		}
		_ = DecodeDTCs([]byte{1, 1, 0x33}, func(DTC) {})
		var s PIDSet
		_, _ = s.AddBitmap(0, []byte{1, 2, 3, 4})
		_, _ = Signal{Name: "a", Length: 2, Scale: 1}.Decode([]byte{1, 2})
	})
	if allocs != 0 {
		t.Errorf("%v allocations per decode, want 0", allocs)
	}
	if sum == 0 {
		t.Error("nothing decoded")
	}
}

func TestSchedulerResponseZeroAlloc(t *testing.T) {
	f := newFakeECU(Addr{}, time.Millisecond)
	fill(f, 0x0C, 0x0D, 0x05, 0x0B, 0x0F, 0x11)
	e, _ := newTestSched(t, f, Config{Channels: sixChannels})
	e.cfg.emit = func(Addr, time.Time, []Reading) {}
	e.bitmapBase = -1
	now := t0
	payload := []byte{0x41, 0x0C, 0x1A, 0xF8, 0x0D, 0x32, 0x05, 0x5A, 0x0B, 0x65, 0x0F, 0x40, 0x11, 0x80}
	allocs := testing.AllocsPerRun(100, func() {
		now = now.Add(100 * time.Millisecond)
		if _, _, ok := e.next(now); !ok {
			t.Fatal("nothing due")
		}
		e.sent(now)
		e.handle(now.Add(time.Millisecond), payload)
	})
	if allocs != 0 {
		t.Errorf("%v allocations per scheduled exchange, want 0", allocs)
	}
}

func BenchmarkDecodeCurrentData(b *testing.B) {
	b.ReportAllocs()
	var sum float64
	fn := func(_ PID, _ ChannelIndex, v float64) { sum += v }
	fields := 0
	_ = DecodeCurrentData(sixPIDResponse, func(PID, ChannelIndex, float64) { fields++ })
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := DecodeCurrentData(sixPIDResponse, fn); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "responses/s")
	b.ReportMetric(float64(b.N*fields)/b.Elapsed().Seconds(), "values/s")
}

func BenchmarkSchedulerExchange(b *testing.B) {
	b.ReportAllocs()
	f := newFakeECU(Addr{}, time.Millisecond)
	fill(f, 0x0C, 0x0D, 0x05, 0x0B, 0x0F, 0x11)
	rec := newRecorder()
	p, err := NewPoller(Config{Transport: newFakeBus(f), Emit: rec.emit, Channels: sixChannels})
	if err != nil {
		b.Fatal(err)
	}
	e := newECUSched(Addr{}, &p.sc, p.items, t0)
	e.cfg.emit = func(Addr, time.Time, []Reading) {}
	e.bitmapBase = -1
	payload := []byte{0x41, 0x0C, 0x1A, 0xF8, 0x0D, 0x32, 0x05, 0x5A, 0x0B, 0x65, 0x0F, 0x40, 0x11, 0x80}
	now := t0
	for i := 0; i < b.N; i++ {
		now = now.Add(100 * time.Millisecond)
		e.next(now)
		e.sent(now)
		e.handle(now.Add(time.Millisecond), payload)
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "exchanges/s")
}
