package obd

import (
	"context"
	"strings"
	"sync"
	"testing"
	"time"
)

type syncRecorder struct {
	mu sync.Mutex
	n  map[Addr]map[string]int
}

func (r *syncRecorder) emit(ecu Addr, _ time.Time, rs []Reading) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.n[ecu] == nil {
		r.n[ecu] = map[string]int{}
	}
	for _, x := range rs {
		c, _, _ := StandardChannel(x.Channel)
		r.n[ecu][c.Name]++
	}
}

func (r *syncRecorder) count(ecu Addr, name string) int {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.n[ecu][name]
}

// TestPollerRun runs the whole Poller over the fake bus: functional discovery
// of two ECUs, physical polling of each, concurrently, one slow.
func TestPollerRun(t *testing.T) {
	for _, format := range []Format{ID11, ID29} {
		a1, _ := PhysicalAddr(format, 0)
		a2, _ := PhysicalAddr(format, 1)
		if format == ID29 {
			a1, _ = PhysicalAddr(format, 0x10)
			a2, _ = PhysicalAddr(format, 0x18)
		}
		fast := newFakeECU(a1, 2*time.Millisecond)
		fill(fast, 0x0C, 0x0D, 0x05)
		slow := newFakeECU(a2, 60*time.Millisecond)
		slow.multi = multiFirst
		fill(slow, 0x0C, 0x0D)
		bus := newFakeBus(fast, slow)
		rec := &syncRecorder{n: map[Addr]map[string]int{}}
		p, err := NewPoller(Config{Transport: bus, Format: format, Emit: rec.emit, Channels: []PollChannel{
			{Name: "ecu_engine_speed", Interval: 20 * time.Millisecond, Priority: 5},
			{Name: "ecu_vehicle_speed", Interval: 20 * time.Millisecond},
			{Name: "ecu_coolant_temperature", Interval: 200 * time.Millisecond}},
			DiscoveryWindow: 150 * time.Millisecond, InitialTimeout: 300 * time.Millisecond})
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan error, 1)
		go func() { done <- p.Run(ctx) }()
		deadline := time.Now().Add(10 * time.Second)
		for time.Now().Before(deadline) && (rec.count(a1, "ecu_engine_speed") < 20 || rec.count(a2, "ecu_vehicle_speed") < 3 ||
			rec.count(a1, "ecu_coolant_temperature") < 2) {
			time.Sleep(10 * time.Millisecond)
		}
		cancel()
		if err := <-done; err != context.Canceled {
			t.Errorf("Run returned %v", err)
		}
		if rec.count(a1, "ecu_engine_speed") < 20 || rec.count(a2, "ecu_vehicle_speed") < 3 || rec.count(a1, "ecu_coolant_temperature") < 2 {
			t.Fatalf("%v: readings %v", format, rec.n)
		}
		if rec.count(a2, "ecu_coolant_temperature") != 0 {
			t.Errorf("%v: slow ECU does not support PID 05 but produced it", format)
		}
		// The fast ECU was not held up by the slow one.
		if rec.count(a1, "ecu_engine_speed") <= rec.count(a2, "ecu_engine_speed") {
			t.Errorf("%v: fast ECU %d readings, slow %d", format, rec.count(a1, "ecu_engine_speed"), rec.count(a2, "ecu_engine_speed"))
		}
		st := p.Stats()
		if len(st.ECUs) != 2 || st.Requests == 0 || st.Responses == 0 || st.DiscoveryRounds != 1 {
			t.Fatalf("%v: stats %+v", format, st)
		}
		for _, e := range st.ECUs {
			if e.ResponseTime <= 0 {
				t.Errorf("%v %v: no response time", format, e.Addr)
			}
			if e.Addr == a2 && e.MultiPID != MultiNo {
				t.Errorf("%v: slow ECU multi %v, want learned no", format, e.MultiPID)
			}
			if e.Addr == a1 && e.MultiPID != MultiYes {
				t.Errorf("%v: fast ECU multi %v, want yes", format, e.MultiPID)
			}
		}
		bus.mu.Lock()
		if !bus.sent[0].Functional || bus.sent[0].Format != format {
			t.Errorf("first request to %v, want functional", bus.sent[0])
		}
		bus.mu.Unlock()
	}
}

func TestPollerStaticECUAndRediscovery(t *testing.T) {
	// Nobody answers discovery: Run keeps retrying until cancelled.
	bus := newFakeBus()
	p, err := NewPoller(Config{Transport: bus, Emit: func(Addr, time.Time, []Reading) {},
		Channels: sixChannels[:1], DiscoveryWindow: 5 * time.Millisecond, MaxBackoff: 10 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 200*time.Millisecond)
	defer cancel()
	if err := p.Run(ctx); err != context.DeadlineExceeded {
		t.Errorf("Run: %v", err)
	}
	if r := p.Stats().DiscoveryRounds; r < 3 {
		t.Errorf("discovery rounds %d, want retries", r)
	}
	// Static ECU list: no discovery, bitmap asked physically.
	a, _ := PhysicalAddr(ID11, 2)
	f := newFakeECU(a, time.Millisecond)
	fill(f, 0x0C)
	bus = newFakeBus(f)
	rec := &syncRecorder{n: map[Addr]map[string]int{}}
	p, _ = NewPoller(Config{Transport: bus, Emit: rec.emit, ECUs: []Addr{a}, Channels: sixChannels[:1]})
	ctx2, cancel2 := context.WithCancel(context.Background())
	go func() {
		for rec.count(a, "ecu_engine_speed") < 3 {
			time.Sleep(5 * time.Millisecond)
		}
		cancel2()
	}()
	_ = p.Run(ctx2)
	reqs := f.requests()
	if reqs[0].String() != "01 00" || p.Stats().DiscoveryRounds != 0 {
		t.Errorf("first request %v, rounds %d", reqs[0], p.Stats().DiscoveryRounds)
	}
}

func TestNewPollerErrors(t *testing.T) {
	emit := func(Addr, time.Time, []Reading) {}
	bus := newFakeBus()
	bad := map[string]Config{
		"Transport":     {Emit: emit, Channels: sixChannels},
		"Emit":          {Transport: bus, Channels: sixChannels},
		"unknown":       {Transport: bus, Emit: emit, Channels: []PollChannel{{Name: "ecu_nope", Interval: time.Second}}},
		"Interval":      {Transport: bus, Emit: emit, Channels: []PollChannel{{Name: "ecu_engine_speed"}}},
		"nothing":       {Transport: bus, Emit: emit},
		"ECUs[0]":       {Transport: bus, Emit: emit, Channels: sixChannels, ECUs: []Addr{FunctionalAddr(ID11)}},
		"Signals[0]":    {Transport: bus, Emit: emit, Signals: []PollSignal{{Signal: Signal{Name: "x", Length: 9, Scale: 1}, Interval: time.Second}}},
		"is a standard": {Transport: bus, Emit: emit, Signals: []PollSignal{{Signal: Signal{Name: "ecu_engine_speed", Length: 1, Scale: 1}, Interval: time.Second}}},
	}
	for want, cfg := range bad {
		if _, err := NewPoller(cfg); err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("%s: %v", want, err)
		}
	}
	p, err := NewPoller(Config{Transport: bus, Emit: emit, Channels: sixChannels,
		Signals: []PollSignal{{Signal: Signal{Name: "user_x", Length: 1, Scale: 1}, Interval: time.Second}}})
	if err != nil {
		t.Fatal(err)
	}
	chs := p.Channels()
	if len(chs) != int(NumStandardChannels())+1 || chs[NumStandardChannels()].Name != "user_x" {
		t.Errorf("Channels: %d, last %q", len(chs), chs[len(chs)-1].Name)
	}
}
