package obd

import (
	"context"
	"errors"
	"slices"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
)

func TestExchange(t *testing.T) {
	a := newFakeECU(Addr{Format: ID11, ECU: 0}, time.Millisecond)
	fill(a, 0x0C, 0x0D)
	a.pending[0x0D] = 1
	a.pidDelay[0x0D] = 50 * time.Millisecond // NRC 0x78 at 30 ms, data at 50 ms
	b := newFakeECU(Addr{Format: ID11, ECU: 2}, 2*time.Millisecond)
	fill(b, 0x0C)
	b.silent[0x05] = true
	bus := newFakeBus(a, b)
	ctx := context.Background()
	req := func(p ...PID) Request { r, _ := CurrentData(p...); return r }
	for _, tc := range []struct {
		name  string
		to    Addr
		req   Request
		from  []Addr
		minRT time.Duration
	}{
		{"functional collects every ECU", FunctionalAddr(ID11), req(0x0C), []Addr{a.addr, b.addr}, 0},
		{"physical takes the first answer", b.addr, req(0x0C), []Addr{b.addr}, 0},
		{"response pending skipped", a.addr, req(0x0D), []Addr{a.addr}, 50 * time.Millisecond},
		{"silence is no error", b.addr, req(0x05), nil, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ms, rt, err := Exchange(ctx, bus, nil, tc.to, tc.req, 150*time.Millisecond)
			if err != nil {
				t.Fatal(err)
			}
			var from []Addr
			for _, m := range ms {
				from = append(from, m.From)
				if r, err := ParseResponse(m.Payload); err != nil || r.Negative {
					t.Errorf("answer % X: %v %+v", m.Payload, err, r)
				}
			}
			slices.SortFunc(from, func(x, y Addr) int { return int(x.ECU) - int(y.ECU) })
			if !slices.Equal(from, tc.from) {
				t.Errorf("answers from %v, want %v", from, tc.from)
			}
			if len(ms) > 0 && (rt < tc.minRT || rt <= 0) {
				t.Errorf("response time %v, want ≥ %v", rt, tc.minRT)
			}
		})
	}
}

// TestExchangeWindowByInjectedClock: the window is timed by the clock given,
// and a cancelled context is returned as an error.
func TestExchangeWindowByInjectedClock(t *testing.T) {
	f := newFakeECU(Addr{Format: ID11}, time.Millisecond)
	f.silent[0x05] = true
	bus := newFakeBus(f)
	clk := clock.NewManual(time.Unix(1000, 0))
	r, _ := CurrentData(0x05)
	type result struct {
		n   int
		err error
	}
	done := make(chan result, 1)
	go func() {
		ms, _, err := Exchange(context.Background(), bus, clk, f.addr, r, time.Second)
		done <- result{len(ms), err}
	}()
	for clk.Pending() == 0 {
		time.Sleep(100 * time.Microsecond) // wait for Exchange to arm its window
	}
	clk.Advance(999 * time.Millisecond)
	select {
	case res := <-done:
		t.Fatalf("returned before the window closed: %+v", res)
	default:
	}
	clk.Advance(time.Millisecond)
	if res := <-done; res.n != 0 || res.err != nil {
		t.Errorf("after the window: %d messages, %v", res.n, res.err)
	}

	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, _, err := Exchange(ctx, bus, clk, f.addr, r, time.Second); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled: err = %v", err)
	}
}

func TestDiscoverFake(t *testing.T) {
	full := newFakeECU(Addr{Format: ID11, ECU: 0}, time.Millisecond)
	fill(full, 0x05, 0x0C, 0x0D, 0x42)
	single := newFakeECU(Addr{Format: ID11, ECU: 1}, time.Millisecond)
	fill(single, 0x0C, 0x11)
	single.multi = multiNRC
	ecus, err := Discover(context.Background(), newFakeBus(full, single), DiscoverConfig{Format: ID11, FunctionalWindow: 50 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	slices.SortFunc(ecus, func(x, y *Responder) int { return int(x.Addr.ECU) - int(y.Addr.ECU) })
	for i, want := range []struct {
		addr  Addr
		pids  []PID
		multi bool
		times int // bitmap answers + the multi-PID answer
	}{
		{full.addr, []PID{0x05, 0x0C, 0x0D, 0x42}, true, 3 + 1}, // bitmaps 00, 20, 40
		{single.addr, []PID{0x0C, 0x11}, false, 1 + 1},          // the NRC 0x12 is timed too
	} {
		if i >= len(ecus) {
			t.Fatalf("%d responders, want 2", len(ecus))
		}
		e := ecus[i]
		if e.Addr != want.addr || !slices.Equal(e.DataPIDs(), want.pids) || e.MultiPID != want.multi || e.VIN != "" {
			t.Errorf("responder %d: %v pids %X multi %v vin %q; want %v %X %v", i, e.Addr, e.DataPIDs(), e.MultiPID, e.VIN, want.addr, want.pids, want.multi)
		}
		if len(e.Times) != want.times {
			t.Errorf("responder %d: %d response times, want %d", i, len(e.Times), want.times)
		}
		if e.MedianResponseTime() <= 0 {
			t.Errorf("responder %d: median response time %v", i, e.MedianResponseTime())
		}
	}
	if len(ecus) != 2 {
		t.Errorf("%d responders, want 2", len(ecus))
	}
	none, err := Discover(context.Background(), newFakeBus(), DiscoverConfig{Format: ID11, FunctionalWindow: 20 * time.Millisecond})
	if err != nil || len(none) != 0 {
		t.Errorf("empty bus: %v, %v", none, err)
	}
}

func TestMedianResponseTime(t *testing.T) {
	for _, tc := range []struct {
		in   []time.Duration
		want time.Duration
	}{
		{nil, 0},
		{[]time.Duration{3}, 3},
		{[]time.Duration{5, 1, 3}, 3},
		{[]time.Duration{4, 1, 3, 2}, 3},
	} {
		r := Responder{Times: tc.in}
		if got := r.MedianResponseTime(); got != tc.want {
			t.Errorf("median %v = %v, want %v", tc.in, got, tc.want)
		}
	}
}
