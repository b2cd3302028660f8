package console

import (
	"bufio"
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline"
)

// rig is a pipeline with a few catalogue channels and a console over it.
type rig struct {
	t     testing.TB
	p     *pipeline.Pipeline
	srv   *Server
	ids   map[string]pipeline.ChannelID
	clk   *clock.Manual // nil with the system clock
	http  *httptest.Server
	mux   *http.ServeMux
	stop  context.CancelFunc
	done  chan struct{}
	pdone chan struct{}
}

var rigChannels = []string{"engine_speed", "oil_temp", "boost_pressure", "coolant_temp", "turbo_warmup_warning", "cooldown_idle_remaining", "brake_power"}

func newRig(t testing.TB, cfg Config, manual bool) *rig {
	t.Helper()
	reg := pipeline.NewRegistry()
	r := &rig{t: t, ids: map[string]pipeline.ChannelID{}}
	for _, n := range rigChannels {
		ch, ok := pipeline.Catalogued(n)
		if !ok {
			t.Fatalf("%s is not catalogued", n)
		}
		ch.Source = "test"
		id, err := reg.Register(ch)
		if err != nil {
			t.Fatal(err)
		}
		r.ids[n] = id
	}
	if manual {
		r.clk = clock.NewManual(time.Date(2026, 5, 1, 10, 0, 0, 0, time.UTC))
		cfg.Clock = r.clk
	}
	if cfg.Vehicle == "" {
		cfg.Vehicle = "test-car"
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.New(slog.DiscardHandler)
	}
	r.p = pipeline.New(reg, nil, pipeline.Options{})
	r.srv = New(cfg, r.p)
	ctx, cancel := context.WithCancel(context.Background())
	r.stop = cancel
	r.done, r.pdone = make(chan struct{}), make(chan struct{})
	// The pipeline's loop only carries events here: samples go in with
	// Process, synchronously, from the test's goroutine.
	go func() { r.p.Run(ctx); close(r.pdone) }()
	go func() { r.srv.Run(ctx); close(r.done) }()
	mux := http.NewServeMux()
	mux.Handle("/console/", r.srv.Handler())
	r.mux = mux
	r.http = httptest.NewServer(mux)
	t.Cleanup(func() {
		r.shutdown()
		r.http.Close()
	})
	return r
}

func (r *rig) shutdown() {
	r.stop()
	<-r.done
	<-r.pdone
}

func (r *rig) now() time.Time {
	if r.clk != nil {
		return r.clk.Now()
	}
	return time.Now()
}

// put processes one sample and waits until the console has taken it.
func (r *rig) put(name string, v float64, at time.Time) {
	r.t.Helper()
	n := r.srv.hub.taken.Load()
	r.p.Process(pipeline.Sample{Channel: r.ids[name], Value: v, Time: at})
	waitFor(r.t, "the console takes the sample", func() bool { return r.srv.hub.taken.Load() > n })
}

// advance moves the manual clock and waits until the console's loop has
// handled any tick and waits for the next.
func (r *rig) advance(d time.Duration) {
	r.t.Helper()
	r.clk.Advance(d)
	waitFor(r.t, "the console waits for its next tick", func() bool { return r.clk.Pending() == 1 })
}

func waitFor(t testing.TB, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting until %s", what)
		}
		time.Sleep(time.Millisecond)
	}
}

// msg is one server-sent event as a browser receives it.
type msg struct {
	ID, Event string
	Data      json.RawMessage
	At        time.Time // when the client read it
}

// sseClient reads a stream into a list the test inspects.
type sseClient struct {
	mu   sync.Mutex
	msgs []msg
	body io.Closer
	got  chan msg // every message, for the benchmark
}

func (r *rig) connect() *sseClient {
	r.t.Helper()
	return r.connectTo("/console/stream")
}

// connectTo reads the stream at path (with its query).
func (r *rig) connectTo(path string) *sseClient {
	r.t.Helper()
	resp, err := http.Get(r.http.URL + path)
	if err != nil {
		r.t.Fatal(err)
	}
	if resp.StatusCode != 200 || resp.Header.Get("Content-Type") != "text/event-stream" {
		r.t.Fatalf("stream: %s, %q", resp.Status, resp.Header.Get("Content-Type"))
	}
	c := &sseClient{body: resp.Body, got: make(chan msg, 1<<16)}
	r.t.Cleanup(func() { resp.Body.Close() })
	go func() {
		sc := bufio.NewScanner(resp.Body)
		sc.Buffer(make([]byte, 1<<20), 1<<20)
		var m msg
		for sc.Scan() {
			line := sc.Text()
			switch {
			case line == "":
				if m.Event != "" {
					m.At = time.Now()
					c.mu.Lock()
					c.msgs = append(c.msgs, m)
					c.mu.Unlock()
					select {
					case c.got <- m:
					default:
					}
				}
				m = msg{}
			case strings.HasPrefix(line, "id: "):
				m.ID = line[4:]
			case strings.HasPrefix(line, "event: "):
				m.Event = line[7:]
			case strings.HasPrefix(line, "data: "):
				m.Data = json.RawMessage(line[6:])
			}
		}
	}()
	return c
}

// sync waits until the client has read every message sent so far.
func (c *sseClient) sync(t testing.TB, r *rig) {
	t.Helper()
	r.srv.hub.mu.Lock()
	last := strconv.FormatUint(r.srv.hub.seq, 10)
	r.srv.hub.mu.Unlock()
	waitFor(t, "the client has read message "+last, func() bool {
		c.mu.Lock()
		defer c.mu.Unlock()
		return len(c.msgs) > 0 && c.msgs[len(c.msgs)-1].ID == last
	})
}

func (c *sseClient) all(event string) []msg {
	c.mu.Lock()
	defer c.mu.Unlock()
	var out []msg
	for _, m := range c.msgs {
		if event == "" || m.Event == event {
			out = append(out, m)
		}
	}
	return out
}

func (c *sseClient) wait(t testing.TB, event string, n int) []msg {
	t.Helper()
	waitFor(t, "the client has "+event+" messages", func() bool { return len(c.all(event)) >= n })
	return c.all(event)
}

type valuesMsg struct {
	T int64       `json:"t"`
	V []valueJSON `json:"v"`
}

// values returns every value the client received for channel id, in order.
func (c *sseClient) values(t testing.TB, id pipeline.ChannelID) []valueJSON {
	var out []valueJSON
	for _, m := range c.all("values") {
		var vm valuesMsg
		if err := json.Unmarshal(m.Data, &vm); err != nil {
			t.Fatal(err)
		}
		for _, v := range vm.V {
			if v.C == int(id) {
				out = append(out, v)
			}
		}
	}
	return out
}

func TestSnapshotOnConnect(t *testing.T) {
	r := newRig(t, Config{CurrentRun: func() string { return "run-from-config" }}, true)
	now := r.now()
	r.put("engine_speed", 3250, now)
	r.put("oil_temp", 97, now.Add(-time.Minute)) // older than its maximum age: not in the snapshot
	r.p.Emit(pipeline.Event{Kind: "warning_raised", Name: "oil_hot", Start: now, End: now,
		Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"active": 1, "oil_temp": 131}})
	r.p.Emit(pipeline.Event{Kind: "turbo_lag", Name: "pull", Start: now, End: now, Fields: map[string]float64{"lag_s": 0.62}})
	waitFor(t, "the console has seen both events", func() bool {
		r.srv.hub.mu.Lock()
		defer r.srv.hub.mu.Unlock()
		return len(r.srv.hub.warnings) == 1 && len(r.srv.hub.recent) == 1
	})
	c := r.connect()
	first := c.wait(t, "", 1)[0]
	if first.Event != "snapshot" {
		t.Fatalf("first message is %q, want the snapshot", first.Event)
	}
	var s snapshotJSON
	if err := json.Unmarshal(first.Data, &s); err != nil {
		t.Fatal(err)
	}
	if s.Vehicle != "test-car" || s.Run != "run-from-config" || s.RateHz != 10 || s.LostAfterMS != 2000 {
		t.Errorf("snapshot header: %+v", s)
	}
	if s.Controls.Ack != AckPath || s.Controls.Start != StartPath || s.Controls.Enabled {
		t.Errorf("controls: %+v", s.Controls)
	}
	if len(s.Channels) != len(rigChannels) || s.Channels[r.ids["oil_temp"]].Name != "oil_temp" || s.Channels[r.ids["oil_temp"]].Unit != "°C" {
		t.Errorf("channels: %+v", s.Channels)
	}
	if len(s.Values) != 1 || s.Values[0].C != int(r.ids["engine_speed"]) || s.Values[0].X != "3250" || s.Values[0].U != "rpm" || *s.Values[0].V != 3250 {
		t.Errorf("values: want only the fresh engine speed, got %+v", s.Values)
	}
	if len(s.Warnings) != 1 || s.Warnings[0].Name != "oil_hot" || s.Warnings[0].Severity != "critical" || s.Warnings[0].Fields["oil_temp"] != 131 {
		t.Errorf("warnings: %+v", s.Warnings)
	}
	if len(s.Events) != 1 || s.Events[0].Kind != "turbo_lag" {
		t.Errorf("events: %+v", s.Events)
	}
	// A run started since is the snapshot's run from then on.
	r.p.Emit(pipeline.Event{Kind: "run_started", Name: "run-2", Start: now})
	c.wait(t, "event", 1)
	c2 := r.connect()
	if err := json.Unmarshal(c2.wait(t, "snapshot", 1)[0].Data, &s); err != nil || s.Run != "run-2" {
		t.Errorf("second snapshot's run %q, %v", s.Run, err)
	}
}

// TestCoalescingRate: 100 samples a second of one channel reach the browser
// 10 times a second, and the last value always arrives.
func TestCoalescingRate(t *testing.T) {
	for _, tc := range []struct {
		rate float64
		want int // messages in the first second
	}{{10, 10}, {4, 4}, {50, 50}} {
		t.Run("", func(t *testing.T) {
			r := newRig(t, Config{Rate: tc.rate}, true)
			c := r.connect()
			c.wait(t, "snapshot", 1)
			start := r.now()
			id := r.ids["engine_speed"]
			for i := range 100 {
				r.put("engine_speed", float64(i), r.now())
				r.advance(10 * time.Millisecond)
			}
			// now = start + 1 s; the value of 990 ms was held until its
			// interval had passed.
			c.sync(t, r)
			inFirst := 0
			for _, m := range c.all("values") {
				var vm valuesMsg
				json.Unmarshal(m.Data, &vm)
				if time.UnixMilli(vm.T).Before(start.Add(time.Second)) {
					inFirst++
				}
			}
			if inFirst != tc.want {
				t.Errorf("rate %g Hz: %d messages sent in the first second, want %d", tc.rate, inFirst, tc.want)
			}
			r.advance(time.Duration(float64(time.Second) / tc.rate))
			c.sync(t, r)
			if vs := c.values(t, id); len(vs) != tc.want+1 || *vs[len(vs)-1].V != 99 {
				t.Errorf("rate %g Hz: %d values, the last %v; want %d, the last 99", tc.rate, len(vs), *vs[len(vs)-1].V, tc.want+1)
			}
			vs := c.values(t, id)
			for i := 1; i < len(vs); i++ {
				if *vs[i].V <= *vs[i-1].V {
					t.Errorf("values out of order: %v then %v", *vs[i-1].V, *vs[i].V)
				}
			}
		})
	}
}

// TestEventsImmediate: warnings and events go out at once, without waiting
// for a tick of the display rate.
func TestEventsImmediate(t *testing.T) {
	r := newRig(t, Config{}, true)
	c := r.connect()
	c.wait(t, "snapshot", 1)
	now := r.now()
	r.put("boost_pressure", 100000, now)
	r.put("boost_pressure", 110000, now) // within the interval: held back
	r.p.Emit(pipeline.Event{Kind: "warning_raised", Name: "boost_high", Start: now, End: now, Tags: map[string]string{"severity": "warning"}})
	r.p.Emit(pipeline.Event{Kind: "turbo_lag", Name: "pull", Start: now, End: now})
	r.p.Emit(pipeline.Event{Kind: "warning_cleared", Name: "boost_high", Start: now, End: now})
	// The clock never moves: everything below came without a tick.
	ws := c.wait(t, "warning", 2)
	ev := c.wait(t, "event", 1)
	var w0, w1, e eventJSON
	json.Unmarshal(ws[0].Data, &w0)
	json.Unmarshal(ws[1].Data, &w1)
	json.Unmarshal(ev[0].Data, &e)
	if w0.Kind != "warning_raised" || w0.Name != "boost_high" || w0.Severity != "warning" || w1.Kind != "warning_cleared" || e.Kind != "turbo_lag" {
		t.Errorf("events: %+v %+v %+v", w0, w1, e)
	}
	if vs := c.values(t, r.ids["boost_pressure"]); len(vs) != 1 || *vs[0].V != 100000 {
		t.Errorf("values before a tick: %+v, want only the first", vs)
	}
	if r.clk.Now() != now {
		t.Fatal("the clock moved")
	}
}

// TestSlowClientDropped: a browser that does not read is disconnected and
// counted once its queue is full; the pipeline and the other browsers go on.
func TestSlowClientDropped(t *testing.T) {
	r := newRig(t, Config{QueueSize: 4}, true)
	slow := r.srv.hub.join("", r.srv.cfg.Formatter) // joined, never read: its queue holds the snapshot
	fast := r.connect()
	fast.wait(t, "snapshot", 1)
	if g := r.srv.Report().Gauges[0]; g.Name != "clients" || g.Value != 2 {
		t.Fatalf("gauge %+v, want 2 clients", g)
	}
	now := r.now()
	for i := range 10 {
		r.p.Emit(pipeline.Event{Kind: "turbo_lag", Name: "pull", Start: now, End: now, Fields: map[string]float64{"i": float64(i)}})
		fast.wait(t, "event", i+1)
	}
	select {
	case <-slow.gone:
	default:
		t.Fatal("the slow client was not dropped")
	}
	rep := r.srv.Report()
	counters := map[string]uint64{}
	for _, c := range rep.Counters {
		counters[c.Name] = c.Value
	}
	if rep.Kind != "console" || !rep.Up || rep.Gauges[0].Value != 1 || counters["dropped_clients"] != 1 || counters["dropped_messages"] != 5 {
		t.Errorf("report %+v (the snapshot and 3 events queued, the 4th refused: 5 messages dropped)", rep)
	}
	if len(fast.all("event")) != 10 {
		t.Errorf("the fast client got %d events, want 10", len(fast.all("event")))
	}
}

// TestStaleFlag: a channel whose latest value is older than its maximum age
// is flagged stale once, and live again with its next value; heartbeats
// keep coming while nothing changes.
func TestStaleFlag(t *testing.T) {
	r := newRig(t, Config{}, true)
	c := r.connect()
	c.wait(t, "snapshot", 1)
	id := r.ids["coolant_temp"]
	maxAge := r.p.Registry().Channel(id).Age()
	r.put("coolant_temp", 88, r.now())
	for elapsed := 25 * time.Millisecond; elapsed <= maxAge; elapsed += 25 * time.Millisecond {
		r.advance(25 * time.Millisecond)
	}
	c.sync(t, r)
	if len(c.all("stale")) != 0 {
		t.Fatalf("flagged stale at its maximum age (%v), not after it", maxAge)
	}
	r.advance(25 * time.Millisecond)
	st := c.wait(t, "stale", 1)
	var sm struct{ C []int }
	json.Unmarshal(st[0].Data, &sm)
	if len(sm.C) != 1 || sm.C[0] != int(id) {
		t.Errorf("stale message %s, want channel %d", st[0].Data, id)
	}
	beats := len(c.wait(t, "heartbeat", 2))
	for range 80 {
		r.advance(25 * time.Millisecond)
	}
	if n := len(c.wait(t, "heartbeat", beats+2)); n < beats+2 {
		t.Errorf("heartbeats: %d", n)
	}
	if len(c.all("stale")) != 1 {
		t.Errorf("stale sent %d times, want once", len(c.all("stale")))
	}
	r.put("coolant_temp", 89, r.now())
	waitFor(t, "the new value arrives", func() bool { return len(c.values(t, id)) == 2 })
	if v := c.values(t, id)[1]; v.S || v.Q != "ok" {
		t.Errorf("new value %+v should be live", v)
	}
	for range 90 {
		r.advance(25 * time.Millisecond)
	}
	waitFor(t, "stale again", func() bool { return len(c.all("stale")) == 2 })
}

// TestStopEndsStreams: stopping the console ends every stream, so the HTTP
// server can shut down, and refuses new ones.
func TestStopEndsStreams(t *testing.T) {
	r := newRig(t, Config{}, false)
	c := r.connect()
	c.wait(t, "snapshot", 1)
	r.shutdown()
	resp, err := http.Get(r.http.URL + "/console/stream")
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusServiceUnavailable {
		t.Errorf("stream after stop: %s", resp.Status)
	}
	if r.srv.Report().Up {
		t.Error("up after stop")
	}
}

func TestPages(t *testing.T) {
	r := newRig(t, Config{}, false)
	for _, tc := range []struct{ path, want, ctype string }{
		{"/console/", "Driver", "text/html"},
		{"/console/driver", "not a safety system", "text/html"},
		{"/console/cell", "not a safety system", "text/html"},
		{"/console/wall", "not a safety system", "text/html"},
		{"/console/static/console.js", "EventSource", "text/javascript"},
		{"/console/static/console.css", "--bg", "text/css"},
	} {
		resp, err := http.Get(r.http.URL + tc.path)
		if err != nil {
			t.Fatal(err)
		}
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode != 200 || !strings.Contains(string(b), tc.want) || !strings.HasPrefix(resp.Header.Get("Content-Type"), tc.ctype) {
			t.Errorf("%s: %s %q, body without %q", tc.path, resp.Status, resp.Header.Get("Content-Type"), tc.want)
		}
		if strings.Contains(string(b), "http://") || strings.Contains(string(b), "https://") {
			t.Errorf("%s refers to another site", tc.path)
		}
	}
}

// Event fields reach people in display units, named without their unit.
func TestEventFieldText(t *testing.T) {
	f := People{}
	for _, tc := range []struct {
		field      string
		v          float64
		name, text string
	}{
		{"boost_final_pascals", 109749, "boost final", "110 kPa"},
		{"engine_speed_rpm", 1998.4, "engine speed", "1998 rpm"},
		{"t90_seconds", 1.0391, "t90", "1.04 s"},
		{"overshoot_ratio", 0.003327, "overshoot", "0.3 %"},
		{"count", 3, "count", "3"},
	} {
		name, text := fieldText(f, tc.field, tc.v)
		if name != tc.name || text != tc.text {
			t.Errorf("fieldText(%s, %g) = %q, %q; want %q, %q", tc.field, tc.v, name, text, tc.name, tc.text)
		}
	}
}
