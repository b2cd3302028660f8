package fleet

import (
	"bytes"
	"context"
	"fmt"
	"log/slog"
	"reflect"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
)

var t0 = time.Date(2026, 12, 1, 22, 0, 0, 0, time.UTC)

// msg is one message of the fake feed.
type msg struct {
	topic, payload string
	retained       bool
}

func newTest(t *testing.T, cfg Config) (*Follower, *clock.Manual) {
	t.Helper()
	clk := clock.NewManual(t0)
	cfg.Broker = "tcp://127.0.0.1:1" // never connected: the feed is handed in
	cfg.Clock = clk
	f, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return f, clk
}

func feed(f *Follower, ms ...msg) {
	for _, m := range ms {
		f.handle(m.topic, []byte(m.payload), m.retained)
	}
}

func eventJSON(t *testing.T, e pipeline.Event) string {
	t.Helper()
	b, err := mqttpub.EncodeEvent(e)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

func only(t *testing.T, f *Follower) Vehicle {
	t.Helper()
	vs := f.Vehicles()
	if len(vs) != 1 {
		t.Fatalf("%d vehicles, want 1: %+v", len(vs), vs)
	}
	return vs[0]
}

// TestPayloads feeds each topic's payloads as the publisher writes them and
// checks what the follower keeps.
func TestPayloads(t *testing.T) {
	raised := eventJSON(t, pipeline.Event{Kind: "warning_raised", Name: "oil_pressure_low", Start: t0,
		Fields: map[string]float64{"value": 95000, "limit": 100000}, Tags: map[string]string{"severity": "critical"}})
	raised2 := eventJSON(t, pipeline.Event{Kind: "warning_raised", Name: "coolant_hot", Start: t0})
	lag := eventJSON(t, pipeline.Event{Kind: "turbo_lag", Start: t0, End: t0.Add(time.Second), Fields: map[string]float64{"t90_seconds": 0.8}})
	online := `{"notice":"advisory only, not a safety system","since":"2026-12-01T21:59:00Z","state":"online","vehicle":"car1","version":"v1.2"}`
	offline := `{"notice":"advisory only, not a safety system","state":"offline","vehicle":"car1","version":"v1.2"}`
	snap := `{"channels":{"manifold_pressure":{"v":181250,"unit":"pascals","q":"ok","t":"2026-12-01T21:59:59.9Z"}},"t":"2026-12-01T22:00:00Z"}`
	for _, c := range []struct {
		name  string
		feed  []msg
		check func(t *testing.T, v Vehicle)
	}{
		{"online status with its since", []msg{{"plenum/car1/status", online, true}}, func(t *testing.T, v Vehicle) {
			if v.Name != "car1" || v.State != "online" || !v.Since.Equal(t0.Add(-time.Minute)) || v.Version != "v1.2" {
				t.Errorf("got %+v", v)
			}
		}},
		{"the will marks it offline since it arrived", []msg{{"plenum/car1/status", online, false}, {"plenum/car1/status", offline, false}}, func(t *testing.T, v Vehicle) {
			if v.State != "offline" || !v.Since.Equal(t0) {
				t.Errorf("got state %q since %v", v.State, v.Since)
			}
		}},
		{"an empty retained status forgets the state", []msg{{"plenum/car1/status", online, true}, {"plenum/car1/status", "", true}}, func(t *testing.T, v Vehicle) {
			if v.State != "" || !v.Since.IsZero() {
				t.Errorf("got state %q since %v", v.State, v.Since)
			}
		}},
		{"snapshot with its time", []msg{{"plenum/car1/snapshot", snap, false}}, func(t *testing.T, v Vehicle) {
			want := map[string]mqttpub.Value{"manifold_pressure": {V: 181250, Unit: "pascals", Quality: "ok", Time: "2026-12-01T21:59:59.9Z"}}
			if !reflect.DeepEqual(v.Snapshot, want) || !v.SnapshotTime.Equal(t0) {
				t.Errorf("got %+v at %v", v.Snapshot, v.SnapshotTime)
			}
		}},
		{"a later snapshot replaces the earlier", []msg{{"plenum/car1/snapshot", snap, false}, {"plenum/car1/snapshot", `{"channels":{},"t":"2026-12-01T22:00:01Z"}`, false}}, func(t *testing.T, v Vehicle) {
			if len(v.Snapshot) != 0 || v.Snapshot == nil || !v.SnapshotTime.Equal(t0.Add(time.Second)) {
				t.Errorf("got %+v at %v", v.Snapshot, v.SnapshotTime)
			}
		}},
		{"events kept in order", []msg{{"plenum/car1/events", lag, false}, {"plenum/car1/events", raised, false}}, func(t *testing.T, v Vehicle) {
			if len(v.Events) != 2 || v.Events[0].Kind != "turbo_lag" || v.Events[0].Fields["t90_seconds"] != 0.8 || v.Events[1].Name != "oil_pressure_low" {
				t.Errorf("got %+v", v.Events)
			}
		}},
		{"active warnings sorted by rule", []msg{{"plenum/car1/warning/oil_pressure_low", raised, true}, {"plenum/car1/warning/coolant_hot", raised2, false}}, func(t *testing.T, v Vehicle) {
			if len(v.Warnings) != 2 || v.Warnings[0].Rule != "coolant_hot" || v.Warnings[1].Rule != "oil_pressure_low" ||
				v.Warnings[1].Event.Fields["limit"] != 100000 || v.Warnings[1].Event.Tags["severity"] != "critical" {
				t.Errorf("got %+v", v.Warnings)
			}
		}},
		{"an empty retained message clears a warning", []msg{{"plenum/car1/warning/oil_pressure_low", raised, true}, {"plenum/car1/warning/coolant_hot", raised2, false},
			{"plenum/car1/warning/oil_pressure_low", "", true}}, func(t *testing.T, v Vehicle) {
			if len(v.Warnings) != 1 || v.Warnings[0].Rule != "coolant_hot" {
				t.Errorf("got %+v", v.Warnings)
			}
		}},
		{"clearing a warning never raised is harmless", []msg{{"plenum/car1/warning/boost_high", "", false}}, func(t *testing.T, v Vehicle) {
			if len(v.Warnings) != 0 || v.Stale {
				t.Errorf("got %+v", v)
			}
		}},
		{"known only from retained messages: stale from the start", []msg{{"plenum/car1/status", online, true}, {"plenum/car1/warning/coolant_hot", raised2, true}}, func(t *testing.T, v Vehicle) {
			if !v.Stale || !v.Heard.IsZero() {
				t.Errorf("stale %v heard %v", v.Stale, v.Heard)
			}
		}},
		{"a live message: heard now, fresh", []msg{{"plenum/car1/snapshot", snap, false}}, func(t *testing.T, v Vehicle) {
			if v.Stale || !v.Heard.Equal(t0) {
				t.Errorf("stale %v heard %v", v.Stale, v.Heard)
			}
		}},
	} {
		t.Run(c.name, func(t *testing.T) {
			f, _ := newTest(t, Config{})
			feed(f, c.feed...)
			c.check(t, only(t, f))
			if n := f.Stats().Malformed.Load(); n != 0 {
				t.Errorf("%d malformed", n)
			}
			if n := f.Stats().Messages.Load(); n != uint64(len(c.feed)) {
				t.Errorf("%d messages counted, want %d", n, len(c.feed))
			}
		})
	}
}

// TestPrefixAndSelf: the prefix may have several segments; the daemon's own
// vehicle is skipped.
func TestPrefixAndSelf(t *testing.T) {
	f, _ := newTest(t, Config{Prefix: "shop/east", Self: "cell2"})
	feed(f, msg{"shop/east/car1/snapshot", `{"channels":{},"t":"2026-12-01T22:00:00Z"}`, false},
		msg{"shop/east/cell2/snapshot", `{"channels":{},"t":"2026-12-01T22:00:00Z"}`, false})
	if v := only(t, f); v.Name != "car1" {
		t.Fatalf("got %+v", v)
	}
	want := []string{"shop/east/+/status", "shop/east/+/snapshot", "shop/east/+/events", "shop/east/+/warning/+"}
	if got := f.Topics(); !reflect.DeepEqual(got, want) {
		t.Fatalf("topics %v, want %v", got, want)
	}
	for _, p := range []string{"a/+", "#", "/x", "x/"} {
		if _, err := New(Config{Broker: "tcp://127.0.0.1:1", Prefix: p}); err == nil {
			t.Errorf("prefix %q accepted", p)
		}
	}
	if _, err := New(Config{}); err == nil {
		t.Error("no broker accepted")
	}
}

// TestMalformed: every unreadable payload is counted, skipped, and leaves
// no vehicle behind; what was known of a vehicle stays.
func TestMalformed(t *testing.T) {
	for _, c := range []msg{
		{"plenum/car1/status", "online", false},
		{"plenum/car1/status", `{"state":"parked"}`, false},
		{"plenum/car1/status", `{"state":"online","since":"yesterday"}`, false},
		{"plenum/car1/snapshot", `{"channels":{}}`, false},
		{"plenum/car1/snapshot", `{"channels":{"x":{"v":"high"}},"t":"2026-12-01T22:00:00Z"}`, false},
		{"plenum/car1/snapshot", `[1,2]`, false},
		{"plenum/car1/events", `{"name":"x"}`, false},
		{"plenum/car1/events", `{`, false},
		{"plenum/car1/warning/oil_pressure_low", `not json`, true},
		{"plenum/car1/warning/", `{"kind":"warning_raised"}`, false},
		{"plenum/car1/events", `{"kind":"turbo_lag","pad":"` + strings.Repeat("x", MaxPayload) + `"}`, false},
		{"plenum/car1/ch/lambda", `{"v":1}`, false},
		{"plenum/car1", `{}`, false},
		{"other/car1/status", `{"state":"online"}`, false},
		{"plenum//status", `{"state":"online"}`, false},
	} {
		t.Run(c.topic+" "+c.payload[:min(len(c.payload), 30)], func(t *testing.T) {
			f, _ := newTest(t, Config{})
			feed(f, c)
			if n := f.Stats().Malformed.Load(); n != 1 {
				t.Errorf("malformed %d, want 1", n)
			}
			if vs := f.Vehicles(); len(vs) != 0 {
				t.Errorf("a malformed message made a vehicle: %+v", vs)
			}
			// A vehicle already known keeps what it had.
			feed(f, msg{"plenum/car1/status", `{"state":"online","since":"2026-12-01T21:00:00Z"}`, false}, c)
			if v := only(t, f); v.State != "online" || !v.Since.Equal(t0.Add(-time.Hour)) {
				t.Errorf("after a malformed message: %+v", v)
			}
			if n := f.Stats().Malformed.Load(); n != 2 {
				t.Errorf("malformed %d, want 2", n)
			}
		})
	}
}

// syncBuf collects log lines from several goroutines.
type syncBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuf) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuf) count(sub string) int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return strings.Count(s.b.String(), sub)
}

// TestMalformedLoggedOncePerBurst: a stream of bad payloads is one log line
// until a quiet spell, and counted in full.
func TestMalformedLoggedOncePerBurst(t *testing.T) {
	var logs syncBuf
	f, clk := newTest(t, Config{Logger: slog.New(slog.NewTextHandler(&logs, nil))})
	for i := 0; i < 50; i++ {
		feed(f, msg{"plenum/car1/snapshot", "garbage", false})
		clk.Advance(100 * time.Millisecond)
	}
	if n := logs.count("cannot be read"); n != 1 {
		t.Fatalf("%d log lines for one burst, want 1", n)
	}
	clk.Advance(burstGap)
	feed(f, msg{"plenum/car2/events", "{}", false})
	if n := logs.count("cannot be read"); n != 2 {
		t.Fatalf("%d log lines after a quiet spell, want 2", n)
	}
	if n := f.Stats().Malformed.Load(); n != 51 {
		t.Fatalf("malformed %d, want 51", n)
	}
	if r := f.Report(); counter(r, "malformed_messages") != 51 || counter(r, "messages") != 51 {
		t.Fatalf("report %+v", r)
	}
}

// TestStaleByTheInjectedClock drives the follower's watch loop with a
// manual clock: a vehicle turns stale exactly StaleAfter after it was last
// heard, the change is announced, and a live message makes it fresh again.
func TestStaleByTheInjectedClock(t *testing.T) {
	f, clk := newTest(t, Config{StaleAfter: 2 * time.Second})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); f.watch(ctx) }()
	defer func() { cancel(); <-done }()

	snap := `{"channels":{},"t":"2026-12-01T22:00:00Z"}`
	feed(f, msg{"plenum/car1/snapshot", snap, false}, msg{"plenum/car2/snapshot", snap, false})
	step := func(d time.Duration) {
		t.Helper()
		waitFor(t, "the watch loop to wait on the clock", func() bool { return clk.Pending() == 1 })
		clk.Advance(d)
	}
	stale := func() (names []string) {
		for _, v := range f.Vehicles() {
			if v.Stale {
				names = append(names, v.Name)
			}
		}
		return names
	}
	for i := 0; i < 9; i++ { // 1.8 s
		step(200 * time.Millisecond)
	}
	if s := stale(); len(s) != 0 {
		t.Fatalf("stale at 1.8 s: %v", s)
	}
	feed(f, msg{"plenum/car2/snapshot", snap, false}) // car2 heard at 1.8 s
	ch := f.Changes()
	step(200 * time.Millisecond) // 2.0 s: car1 turns stale
	select {
	case <-ch:
	case <-time.After(10 * time.Second):
		t.Fatal("no change announced when car1 turned stale")
	}
	if s := stale(); !reflect.DeepEqual(s, []string{"car1"}) {
		t.Fatalf("stale at 2.0 s: %v, want [car1]", s)
	}
	if r := f.Report(); gauge(r, "vehicles") != 2 || gauge(r, "stale_vehicles") != 1 {
		t.Fatalf("report %+v", r)
	}
	ch = f.Changes()
	feed(f, msg{"plenum/car1/events", `{"kind":"run_started","start":"2026-12-01T22:00:02Z"}`, false})
	select {
	case <-ch:
	default:
		t.Fatal("a message announced no change")
	}
	if s := stale(); len(s) != 0 {
		t.Fatalf("stale after car1 spoke again: %v", s)
	}
	for i := 0; i < 9; i++ { // 3.8 s: car2 (heard at 1.8 s) turns stale
		step(200 * time.Millisecond)
	}
	if s := stale(); !reflect.DeepEqual(s, []string{"car2"}) {
		t.Fatalf("stale at 3.8 s: %v, want [car2]", s)
	}
}

// TestBounds: the vehicles, the events and the warnings kept are bounded;
// what is dropped is counted and logged once per burst.
func TestBounds(t *testing.T) {
	var logs syncBuf
	f, clk := newTest(t, Config{MaxVehicles: 3, EventsKept: 3, StaleAfter: time.Second, Logger: slog.New(slog.NewTextHandler(&logs, nil))})
	snap := `{"channels":{},"t":"2026-12-01T22:00:00Z"}`
	for _, name := range []string{"car1", "car2", "car3", "car4", "car5"} {
		feed(f, msg{"plenum/" + name + "/snapshot", snap, false})
		clk.Advance(100 * time.Millisecond)
	}
	if got := names(f.Vehicles()); !reflect.DeepEqual(got, []string{"car1", "car2", "car3"}) {
		t.Fatalf("vehicles %v", got)
	}
	if n := f.Stats().Dropped.Load(); n != 2 {
		t.Fatalf("dropped %d, want 2", n)
	}
	if n := logs.count("more vehicles than max_vehicles"); n != 1 {
		t.Fatalf("%d log lines for one burst of drops, want 1", n)
	}
	// Once car1 and car2 are stale (car3 spoke again), newcomers take the
	// places of the vehicles heard from least recently.
	clk.Advance(time.Second)
	feed(f, msg{"plenum/car3/snapshot", snap, false}, msg{"plenum/car4/snapshot", snap, false})
	if got := names(f.Vehicles()); !reflect.DeepEqual(got, []string{"car2", "car3", "car4"}) {
		t.Fatalf("vehicles %v, want car1 forgotten", got)
	}
	feed(f, msg{"plenum/car5/snapshot", snap, false}, msg{"plenum/car6/snapshot", snap, false})
	if got := names(f.Vehicles()); !reflect.DeepEqual(got, []string{"car3", "car4", "car5"}) {
		t.Fatalf("vehicles %v, want car2 forgotten and car6 dropped", got)
	}

	for i := 1; i <= 5; i++ {
		feed(f, msg{"plenum/car3/events", fmt.Sprintf(`{"kind":"turbo_lag","start":"2026-12-01T22:00:0%dZ"}`, i), false})
	}
	var starts []string
	for _, e := range only1(t, f, "car3").Events {
		starts = append(starts, e.Start)
	}
	if want := []string{"2026-12-01T22:00:03Z", "2026-12-01T22:00:04Z", "2026-12-01T22:00:05Z"}; !reflect.DeepEqual(starts, want) {
		t.Fatalf("events kept %v, want the last three oldest first", starts)
	}

	dropped := f.Stats().Dropped.Load()
	for i := 0; i <= MaxWarnings; i++ {
		feed(f, msg{fmt.Sprintf("plenum/car4/warning/rule_%03d", i), `{"kind":"warning_raised"}`, true})
	}
	feed(f, msg{"plenum/car4/warning/rule_000", `{"kind":"warning_raised","name":"again"}`, true}) // an update of a kept one
	w := only1(t, f, "car4").Warnings
	if len(w) != MaxWarnings || w[0].Event.Name != "again" {
		t.Fatalf("%d warnings kept (first %+v), want %d", len(w), w[0], MaxWarnings)
	}
	if n := f.Stats().Dropped.Load() - dropped; n != 1 {
		t.Fatalf("%d warnings dropped, want 1", n)
	}
}

// TestVehiclesIsACopy: what Vehicles returns belongs to the caller.
func TestVehiclesIsACopy(t *testing.T) {
	f, _ := newTest(t, Config{})
	feed(f, msg{"plenum/car1/snapshot", `{"channels":{"lambda":{"v":1,"unit":"ratio","q":"ok","t":"2026-12-01T22:00:00Z"}},"t":"2026-12-01T22:00:00Z"}`, false},
		msg{"plenum/car1/warning/lean", `{"kind":"warning_raised","tags":{"severity":"warning"}}`, false},
		msg{"plenum/car1/events", `{"kind":"turbo_lag","fields":{"t90_seconds":1}}`, false})
	v := only(t, f)
	v.Snapshot["lambda"] = mqttpub.Value{V: 2}
	v.Warnings[0].Event.Tags["severity"] = "none"
	v.Events[0].Fields["t90_seconds"] = 9
	v = only(t, f)
	if v.Snapshot["lambda"].V != 1 || v.Warnings[0].Event.Tags["severity"] != "warning" || v.Events[0].Fields["t90_seconds"] != 1 {
		t.Fatalf("the follower's state changed through a copy: %+v", v)
	}
}

// TestReportBeforeConnecting: a follower that never connected is down,
// with its counters and gauges at zero.
func TestReportBeforeConnecting(t *testing.T) {
	f, _ := newTest(t, Config{})
	r := f.Report()
	if r.Kind != "fleet" || r.Name != "follow" || r.Up || gauge(r, "vehicles") != 0 || len(r.Counters) != 5 {
		t.Fatalf("report %+v", r)
	}
}

func names(vs []Vehicle) []string {
	var out []string
	for _, v := range vs {
		out = append(out, v.Name)
	}
	return out
}

func only1(t *testing.T, f *Follower, name string) Vehicle {
	t.Helper()
	for _, v := range f.Vehicles() {
		if v.Name == name {
			return v
		}
	}
	t.Fatalf("no vehicle %s", name)
	return Vehicle{}
}

func gauge(r pipeline.HealthReport, name string) float64 {
	if v, ok := r.Gauge(name); ok {
		return v
	}
	return -1
}

func counter(r pipeline.HealthReport, name string) uint64 { v, _ := r.Counter(name); return v }

// waitFor waits for cond, polling; it fails the test after 10 s.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(2 * time.Millisecond)
	}
}
