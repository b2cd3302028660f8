package runs

import (
	"context"
	"fmt"
	"log/slog"
	"net/http/httptest"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// logRecorder is a slog.Handler that keeps each record as one line:
// "LEVEL message key=value …".
type logRecorder struct {
	mu    sync.Mutex
	lines []string
}

func (l *logRecorder) Enabled(context.Context, slog.Level) bool { return true }

func (l *logRecorder) Handle(_ context.Context, r slog.Record) error {
	s := r.Level.String() + " " + r.Message
	r.Attrs(func(a slog.Attr) bool { s += fmt.Sprintf(" %s=%v", a.Key, a.Value); return true })
	l.mu.Lock()
	l.lines = append(l.lines, s)
	l.mu.Unlock()
	return nil
}

func (l *logRecorder) WithAttrs([]slog.Attr) slog.Handler { return l }
func (l *logRecorder) WithGroup(string) slog.Handler      { return l }

// String returns every line, one per record.
func (l *logRecorder) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return strings.Join(l.lines, "\n")
}

// matching returns the lines that start with prefix.
func (l *logRecorder) matching(prefix string) []string {
	l.mu.Lock()
	defer l.mu.Unlock()
	var m []string
	for _, s := range l.lines {
		if strings.HasPrefix(s, prefix) {
			m = append(m, s)
		}
	}
	return m
}

// TestRunLog: every way a run starts or stops (start-up, HTTP, MQTT, the
// pull trigger, the daemon's shutdown, a direct call) is one info line
// naming the run and who asked.
func TestRunLog(t *testing.T) {
	http := func(h *harness, verb string) {
		req := httptest.NewRequest("POST", "/api/runs/"+verb, nil)
		req.Header.Set("Authorization", "Bearer tok")
		w := httptest.NewRecorder()
		h.c.Handler().ServeHTTP(w, req)
		if w.Code != 200 {
			t.Fatalf("http %s: %d %s", verb, w.Code, w.Body)
		}
	}
	mqtt := func(h *harness, verb string) {
		if b := h.c.Command("run/"+verb, []byte(`{"request":"r","token":"tok"}`)); !strings.Contains(string(b), `"ok":true`) {
			t.Fatalf("mqtt %s: %s", verb, b)
		}
	}
	cases := []struct {
		name          string
		cfg           Config
		start, stop   func(t *testing.T, h *harness)
		wantStartedBy string
		wantStoppedBy string
	}{
		{"start-up and shutdown", Config{}, func(t *testing.T, h *harness) {
			if _, err := h.c.StartUnlessManual(); err != nil {
				t.Fatal(err)
			}
		}, func(t *testing.T, h *harness) {
			ctx, cancel := context.WithCancel(context.Background())
			cancel()
			h.c.Run(ctx)
		}, "start-up", "shutdown"},
		{"http", Config{Manual: true, ControlToken: "tok"},
			func(t *testing.T, h *harness) { http(h, "start") }, func(t *testing.T, h *harness) { http(h, "stop") }, "http", "http"},
		{"mqtt", Config{Manual: true, ControlToken: "tok"},
			func(t *testing.T, h *harness) { mqtt(h, "start") }, func(t *testing.T, h *harness) { mqtt(h, "stop") }, "mqtt", "mqtt"},
		{"a direct call", Config{Manual: true}, func(t *testing.T, h *harness) {
			if _, err := h.c.Start(StartRequest{Label: "l"}); err != nil {
				t.Fatal(err)
			}
		}, func(t *testing.T, h *harness) {
			if _, err := h.c.Stop(); err != nil {
				t.Fatal(err)
			}
		}, "", ""},
		{"the pull trigger", Config{Manual: true, AutoTrigger: true, SyncEvery: time.Hour}, func(t *testing.T, h *harness) {
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan struct{})
			go func() { defer close(done); h.c.Run(ctx) }()
			t.Cleanup(func() { cancel(); <-done })
			t0 := time.Unix(2000, 0)
			for _, s := range []struct {
				ms       int
				thr, rpm float64
			}{{0, 0.1, 900}, {100, 0.95, 2000}, {400, 0.95, 2050}, {700, 0.95, 2600}} {
				at := t0.Add(time.Duration(s.ms) * time.Millisecond)
				h.p.ProcessFrame([]pipeline.Sample{{Channel: h.thr, Time: at, Value: s.thr}, {Channel: h.rpm, Time: at, Value: s.rpm}})
			}
			waitFor(t, "the pull to start a run", func() bool { return h.c.Current() != "" })
		}, func(t *testing.T, h *harness) {
			t0 := time.Unix(2000, 0)
			h.p.ProcessFrame([]pipeline.Sample{{Channel: h.thr, Time: t0.Add(1300 * time.Millisecond), Value: 0.1}, {Channel: h.rpm, Time: t0.Add(1300 * time.Millisecond), Value: 4200}})
			h.p.Process(pipeline.Sample{Channel: h.thr, Time: t0.Add(3400 * time.Millisecond), Value: 0.1})
			waitFor(t, "the run to end", func() bool { return h.c.Current() == "" })
		}, "trigger", "trigger"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			h := newHarness(t, c.cfg)
			c.start(t, h)
			id := h.c.Current()
			if id == "" {
				t.Fatal("no run started")
			}
			c.stop(t, h)
			if h.c.Current() != "" {
				t.Fatal("the run did not stop")
			}
			want := []string{"INFO run started run=" + id + " by=" + c.wantStartedBy}
			if got := h.logs.matching("INFO run started"); len(got) != 1 || !strings.HasPrefix(got[0], want[0]+" ") {
				t.Errorf("start logged %q, want one line starting %q", got, want[0])
			}
			want = []string{"INFO run stopped run=" + id + " by=" + c.wantStoppedBy + " samples="}
			if got := h.logs.matching("INFO run stopped"); len(got) != 1 || !strings.HasPrefix(got[0], want[0]) {
				t.Errorf("stop logged %q, want one line starting %q", got, want[0])
			}
			if bad := slices.DeleteFunc(slices.Clone(h.logs.lines), func(s string) bool { return strings.HasPrefix(s, "INFO") }); len(bad) > 0 {
				t.Errorf("a clean start and stop logged %q", bad)
			}
		})
	}
}
