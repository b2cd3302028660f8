package runs

import (
	"context"
	"encoding/json"
	"log/slog"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// harness is a controller over a real pipeline (no derivations), recording
// into a temporary directory, with a clock that moves one second per
// reading and the events and summaries it gives kept for inspection.
type harness struct {
	t        *testing.T
	c        *Controller
	p        *pipeline.Pipeline
	sub      *pipeline.Subscription
	dir      string
	x        pipeline.ChannelID
	thr, rpm pipeline.ChannelID

	mu        sync.Mutex
	clock     time.Time
	events    []pipeline.Event
	published [][]byte
	free      uint64 // what the free-space guard reads
	logs      logRecorder
}

func newHarness(t *testing.T, cfg Config) *harness { return newHarnessSized(t, cfg, 1<<12) }

func newHarnessSized(t *testing.T, cfg Config, ring int) *harness {
	t.Helper()
	h := &harness{t: t, dir: t.TempDir(), clock: time.Date(2026, 5, 1, 10, 0, 0, 0, time.UTC), free: 1 << 40}
	reg := pipeline.NewRegistry()
	var err error
	for _, c := range []struct {
		id   *pipeline.ChannelID
		name string
	}{{&h.x, "x"}, {&h.thr, "throttle_position"}, {&h.rpm, "engine_speed"}} {
		if *c.id, err = reg.Register(pipeline.Channel{Name: c.name, Quantity: c.name, Source: "s"}); err != nil {
			t.Fatal(err)
		}
	}
	g, err := pipeline.BuildGraph(reg, nil)
	if err != nil {
		t.Fatal(err)
	}
	h.p = pipeline.New(reg, g, pipeline.Options{})
	h.sub = h.p.Subscribe("recorder", ring)
	cfg.Dir, cfg.Vehicle = h.dir, "test-car"
	h.c = New(cfg, Deps{Registry: reg, Sub: h.sub, Store: h.p.Store(), Log: slog.New(&h.logs),
		DiskSpace: func(string) (uint64, uint64, error) {
			h.mu.Lock()
			defer h.mu.Unlock()
			return h.free, 1 << 41, nil
		},
		Emit: func(e pipeline.Event) {
			h.mu.Lock()
			h.events = append(h.events, e)
			h.mu.Unlock()
		},
		Publish: func(b []byte) {
			h.mu.Lock()
			h.published = append(h.published, b)
			h.mu.Unlock()
		},
		Now: func() time.Time {
			h.mu.Lock()
			defer h.mu.Unlock()
			h.clock = h.clock.Add(time.Second)
			return h.clock
		}})
	return h
}

func (h *harness) eventKinds() []string {
	h.mu.Lock()
	defer h.mu.Unlock()
	var k []string
	for _, e := range h.events {
		k = append(k, e.Kind+":"+e.Name)
	}
	return k
}

// runDirs lists the runs that ended.
func (h *harness) runDirs() []string {
	h.t.Helper()
	m, err := filepath.Glob(filepath.Join(h.dir, "*", "ended"))
	if err != nil {
		h.t.Fatal(err)
	}
	for i := range m {
		m[i] = filepath.Dir(m[i])
	}
	return m
}

func (h *harness) meta(dir string) record.Meta {
	h.t.Helper()
	b, err := os.ReadFile(filepath.Join(dir, "run.json"))
	if err != nil {
		h.t.Fatal(err)
	}
	var m record.Meta
	if err := json.Unmarshal(b, &m); err != nil {
		h.t.Fatal(err)
	}
	return m
}

// waitFor waits until cond holds, failing after 10 s.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(time.Millisecond)
	}
}

// The recorder that cannot keep up says so: one recorder_behind warning at
// the first loss (not one per tick), cleared after 5 s without loss.
func TestRecorderBehindWarning(t *testing.T) {
	h := newHarnessSized(t, Config{}, 8)
	t0 := time.Unix(1000, 0)
	h.c.watchLoss(t0)
	if len(h.events) != 0 {
		t.Fatalf("events without loss: %v", h.events)
	}
	for i := range 100 {
		h.p.Process(pipeline.Sample{Channel: h.x, Time: t0.Add(time.Duration(i) * time.Millisecond), Value: float64(i)})
	}
	if h.sub.Dropped() == 0 {
		t.Fatal("the 8-sample queue dropped nothing")
	}
	h.c.watchLoss(t0.Add(time.Second))
	for i := range 100 {
		h.p.Process(pipeline.Sample{Channel: h.x, Time: t0.Add(time.Second + time.Duration(i)*time.Millisecond), Value: float64(i)})
	}
	h.c.watchLoss(t0.Add(2 * time.Second)) // more loss: still one warning
	h.c.watchLoss(t0.Add(6 * time.Second)) // 4 s quiet: not yet cleared
	evs := h.events
	if len(evs) != 1 || evs[0].Kind != "warning_raised" || evs[0].Name != "recorder_behind" || evs[0].Fields["lost_samples"] < 1 {
		t.Fatalf("events %+v", evs)
	}
	h.c.watchLoss(t0.Add(7 * time.Second))
	evs = h.events
	if len(evs) != 2 || evs[1].Kind != "warning_cleared" {
		t.Fatalf("events %+v", evs)
	}
}

// TestReport: down without a run, up while recording, down while
// recorder_behind is raised; the counters add up across runs.
func TestReport(t *testing.T) {
	h := newHarnessSized(t, Config{}, 8)
	count := func(r pipeline.HealthReport, name string) uint64 {
		for _, c := range r.Counters {
			if c.Name == name {
				return c.Value
			}
		}
		t.Fatalf("report %+v lacks %s", r, name)
		return 0
	}
	r := h.c.Report()
	if r.Kind != "recorder" || r.Name != "recorder" || r.Up || count(r, "lost_samples") != 0 || count(r, "written_samples") != 0 {
		t.Fatalf("before a run: %+v", r)
	}
	if _, err := h.c.Start(StartRequest{}); err != nil {
		t.Fatal(err)
	}
	if r := h.c.Report(); !r.Up {
		t.Fatalf("recording: %+v", r)
	}
	t0 := time.Unix(1000, 0)
	for i := range 5 {
		h.p.Process(pipeline.Sample{Channel: h.x, Time: t0.Add(time.Duration(i) * time.Millisecond), Value: float64(i)})
	}
	buf, _ := h.sub.Drain(nil, nil)
	for _, s := range buf {
		h.c.cur.Write(s)
	}
	if count(h.c.Report(), "written_samples") != 5 {
		t.Fatalf("after 5 samples: %+v", h.c.Report())
	}
	if _, err := h.c.Stop(); err != nil {
		t.Fatal(err)
	}
	if r := h.c.Report(); r.Up || count(r, "written_samples") < 5 {
		t.Fatalf("after the run: %+v", r)
	}
	if _, err := h.c.Start(StartRequest{}); err != nil {
		t.Fatal(err)
	}
	for i := range 20 {
		h.p.Process(pipeline.Sample{Channel: h.x, Time: t0.Add(time.Second + time.Duration(i)*time.Millisecond), Value: float64(i)})
	}
	h.c.watchLoss(t0.Add(time.Second))
	r = h.c.Report()
	if r.Up || count(r, "lost_samples") != h.sub.Dropped() || h.sub.Dropped() == 0 {
		t.Fatalf("losing samples: %+v (dropped %d)", r, h.sub.Dropped())
	}
	h.c.watchLoss(t0.Add(7 * time.Second))
	if r := h.c.Report(); !r.Up {
		t.Fatalf("loss cleared: %+v", r)
	}
}

// TestStartStop: one run at a time, ids and event times from the clock,
// the summary published and emitted at the stop, StartUnlessManual obeys
// Manual.
func TestStartStop(t *testing.T) {
	h := newHarness(t, Config{Manual: true})
	if id, err := h.c.StartUnlessManual(); id != "" || err != nil || h.c.Current() != "" {
		t.Fatalf("manual: started %q (%v)", id, err)
	}
	if _, err := h.c.Stop(); err == nil || !strings.Contains(err.Error(), "no run") {
		t.Fatalf("stop with no run: %v", err)
	}
	id, err := h.c.Start(StartRequest{Label: "l", Notes: "n"})
	if err != nil || id != "20260501T100001.000Z" || h.c.Current() != id {
		t.Fatalf("start: %q %v, current %q", id, err, h.c.Current())
	}
	if _, err := h.c.Start(StartRequest{}); err == nil || !strings.Contains(err.Error(), "already being recorded") {
		t.Fatalf("second start: %v", err)
	}
	sum, err := h.c.Stop()
	if err != nil || sum.Run != id || h.c.Current() != "" {
		t.Fatalf("stop: %+v %v", sum, err)
	}
	if k := strings.Join(h.eventKinds(), " "); k != "run_started:"+id+" run_ended:"+id {
		t.Errorf("events %s", k)
	}
	if h.events[0].Start != time.Date(2026, 5, 1, 10, 0, 1, 0, time.UTC) || h.events[0].Tags["label"] != "l" {
		t.Errorf("run_started %+v", h.events[0])
	}
	var pub record.Summary
	if len(h.published) != 1 || json.Unmarshal(h.published[0], &pub) != nil || pub.Run != id {
		t.Errorf("published %q", h.published)
	}
	if m := h.meta(filepath.Join(h.dir, id)); m.Label != "l" || m.Notes != "n" || m.Vehicle != "test-car" {
		t.Errorf("run.json %+v", m)
	}

	h2 := newHarness(t, Config{})
	if id, err := h2.c.StartUnlessManual(); id == "" || err != nil || h2.c.Current() != id {
		t.Fatalf("not manual: %q (%v)", id, err)
	}
}

// TestHandler: reading the current run needs nothing; commands need the
// control token, are off without one, and answer conflicts and bad forms.
func TestHandler(t *testing.T) {
	type step struct {
		method, path, auth, form string
		want                     int
		wantBody                 string
	}
	cases := []struct {
		name  string
		token string
		steps []step
	}{
		{"commands off", "", []step{
			{"GET", "/api/runs/current", "", "", 200, `{"run":""}`},
			{"POST", "/api/runs/start", "Bearer ", "", 403, "record.control_token"},
			{"POST", "/api/runs/stop", "Bearer x", "", 403, "commands are off"},
		}},
		{"with a token", "s3cret", []step{
			{"POST", "/api/runs/start", "", "", 401, "unauthorized"},
			{"POST", "/api/runs/start", "Bearer s3cre", "", 401, "unauthorized"},
			{"POST", "/api/runs/start", "s3cret", "", 401, "unauthorized"},
			{"POST", "/api/runs/stop", "Bearer s3cret", "", 409, "no run is being recorded"},
			{"POST", "/api/runs/start", "Bearer s3cret", "humidity_percent=140", 400, "humidity_percent"},
			{"POST", "/api/runs/start", "Bearer s3cret", "label=pull+1&pressure_kpa=99.1", 200, `{"ok":true,"run":"20260501T100001.000Z"}`},
			{"GET", "/api/runs/current", "", "", 200, `{"run":"20260501T100001.000Z"}`},
			{"POST", "/api/runs/start", "Bearer s3cret", "", 409, "already being recorded"},
			{"POST", "/api/runs/stop", "Bearer s3cret", "", 200, `{"ok":true,"run":"20260501T100001.000Z","summary":{"run":"20260501T100001.000Z"`},
			{"GET", "/api/runs/current", "", "", 200, `{"run":""}`},
		}},
	}
	for _, c := range cases {
		h := newHarness(t, Config{ControlToken: c.token})
		srv := h.c.Handler()
		for i, s := range c.steps {
			req := httptest.NewRequest(s.method, s.path, strings.NewReader(s.form))
			req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
			if s.auth != "" {
				req.Header.Set("Authorization", s.auth)
			}
			w := httptest.NewRecorder()
			srv.ServeHTTP(w, req)
			if w.Code != s.want || !strings.Contains(w.Body.String(), s.wantBody) || w.Header().Get("Content-Type") != "application/json" {
				t.Errorf("%s step %d (%s %s): %d %q, want %d %q", c.name, i, s.method, s.path, w.Code, w.Body.String(), s.want, s.wantBody)
			}
		}
		if c.token != "" {
			dirs := h.runDirs()
			if len(dirs) != 1 {
				t.Fatalf("%s: %d runs", c.name, len(dirs))
			}
			if m := h.meta(dirs[0]); m.Label != "pull 1" || m.Conditions == nil || m.Conditions.PressurePa == nil ||
				*m.Conditions.PressurePa != 99100 || m.Conditions.Source != "entered" {
				t.Errorf("run.json %+v", m)
			}
		}
	}
}

// TestRunAutoTrigger: Run records what arrives while a run is open; the
// pull trigger starts a run at wide-open throttle with rising engine speed
// and ends the run it started once the throttle has been closed for 2 s.
// Closing ctx closes an open run.
func TestRunAutoTrigger(t *testing.T) {
	h := newHarness(t, Config{Manual: true, AutoTrigger: true, SyncEvery: time.Hour})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); h.c.Run(ctx) }()
	t0 := time.Unix(2000, 0)
	put := func(ms int, thr, rpm float64) {
		at := t0.Add(time.Duration(ms) * time.Millisecond)
		h.p.ProcessFrame([]pipeline.Sample{{Channel: h.thr, Time: at, Value: thr}, {Channel: h.rpm, Time: at, Value: rpm}})
	}
	put(0, 0.1, 900)
	put(100, 0.95, 2000)
	put(400, 0.95, 2050)
	put(700, 0.95, 2600) // held 600 ms, rising: a pull
	waitFor(t, "the pull to start a run", func() bool { return h.c.Current() != "" })
	id := h.c.Current()
	put(1000, 0.95, 4000)
	put(1300, 0.1, 4200)
	put(2500, 0.1, 1500)
	if h.c.Current() != id {
		t.Fatalf("the run ended before the throttle was closed for 2 s")
	}
	// Closed 2.1 s: the pull ends. One sample, so that nothing of it is
	// left for the next run.
	h.p.Process(pipeline.Sample{Channel: h.thr, Time: t0.Add(3400 * time.Millisecond), Value: 0.1})
	waitFor(t, "the run to end", func() bool { return h.c.Current() == "" })
	dirs := h.runDirs()
	if len(dirs) != 1 || filepath.Base(dirs[0]) != id {
		t.Fatalf("runs %v, want %s", dirs, id)
	}
	if m := h.meta(dirs[0]); m.Label != "pull" {
		t.Errorf("run.json %+v", m)
	}
	// A run started by hand is not ended by the trigger, but by ctx.
	manual, err := h.c.Start(StartRequest{Label: "by hand"})
	if err != nil {
		t.Fatal(err)
	}
	put(4000, 0.1, 900)
	put(9000, 0.1, 900)
	cancel()
	<-done
	if n := len(h.runDirs()); n != 2 || h.c.Current() != "" {
		t.Fatalf("%d runs ended, current %q", n, h.c.Current())
	}
	var sum record.Summary
	b, err := os.ReadFile(filepath.Join(h.dir, manual, "summary.json"))
	if err != nil || json.Unmarshal(b, &sum) != nil || sum.Samples != 4 {
		t.Fatalf("the manual run's summary (%v): %s", err, b)
	}
	if k := strings.Join(h.eventKinds(), " "); k != "run_started:"+id+" run_ended:"+id+" run_started:"+manual+" run_ended:"+manual {
		t.Errorf("events %s", k)
	}
}

// The run started with the daemon carries Config.StartLabel in run.json.
func TestStartLabel(t *testing.T) {
	h := newHarness(t, Config{StartLabel: "baseline"})
	id, err := h.c.StartUnlessManual()
	if err != nil || id == "" {
		t.Fatalf("StartUnlessManual = %q, %v", id, err)
	}
	defer h.c.Stop()
	b, err := os.ReadFile(filepath.Join(h.dir, id, "run.json"))
	if err != nil || !strings.Contains(string(b), `"label": "baseline"`) {
		t.Fatalf("run.json %s (%v) lacks the label", b, err)
	}
}
