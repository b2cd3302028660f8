package eventlog

import (
	"context"
	"fmt"
	"log/slog"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// lines is a slog.Handler that keeps each record as one line:
// "LEVEL message key=value …".
type lines struct {
	mu sync.Mutex
	l  []string
}

func (h *lines) Enabled(context.Context, slog.Level) bool { return true }

func (h *lines) Handle(_ context.Context, r slog.Record) error {
	s := r.Level.String() + " " + r.Message
	r.Attrs(func(a slog.Attr) bool { s += fmt.Sprintf(" %s=%v", a.Key, a.Value); return true })
	h.mu.Lock()
	h.l = append(h.l, s)
	h.mu.Unlock()
	return nil
}

func (h *lines) WithAttrs([]slog.Attr) slog.Handler { return h }
func (h *lines) WithGroup(string) slog.Handler      { return h }

func (h *lines) get() []string {
	h.mu.Lock()
	defer h.mu.Unlock()
	return append([]string(nil), h.l...)
}

var t0 = time.Date(2026, 5, 1, 10, 0, 0, 0, time.UTC)

// stoppedPipeline returns a pipeline whose Run has returned: Emit fans its
// events out at once, as during a shutdown.
func stoppedPipeline(t *testing.T) *pipeline.Pipeline {
	t.Helper()
	reg := pipeline.NewRegistry()
	g, err := pipeline.BuildGraph(reg, nil)
	if err != nil {
		t.Fatal(err)
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	p.Run(ctx)
	return p
}

func TestLog(t *testing.T) {
	cases := []struct {
		name string
		ev   pipeline.Event
		want string // "" : nothing logged
	}{
		{"raised", pipeline.Event{Kind: "warning_raised", Name: "over_boost", Start: t0, End: t0.Add(time.Second),
			Tags: map[string]string{"severity": "critical"}}, "INFO warning raised rule=over_boost severity=critical condition_since=2026-05-01T10:00:00Z"},
		{"cleared", pipeline.Event{Kind: "warning_cleared", Name: "over_boost", Start: t0, End: t0.Add(2500 * time.Millisecond),
			Tags: map[string]string{"severity": "critical"}}, "INFO warning cleared rule=over_boost severity=critical lasted=2.5s"},
		{"acknowledged", pipeline.Event{Kind: "warning_acknowledged", Name: "switched_off_hot", Start: t0, End: t0,
			Tags: map[string]string{"severity": "warning"}}, "INFO warning acknowledged rule=switched_off_hot severity=warning"},
		{"no severity tag", pipeline.Event{Kind: "warning_raised", Name: "x", Start: t0}, "INFO warning raised rule=x severity=warning condition_since=2026-05-01T10:00:00Z"},
		{"a run (logged by the run controller)", pipeline.Event{Kind: "run_started", Name: "r"}, ""},
		{"turbo lag", pipeline.Event{Kind: "turbo_lag", Name: "lag"}, ""},
	}
	for _, c := range cases {
		h := &lines{}
		New(Config{Logger: slog.New(h)}, nil).Log(c.ev)
		got := h.get()
		switch {
		case c.want == "" && len(got) > 0:
			t.Errorf("%s: logged %q, want nothing", c.name, got)
		case c.want != "" && (len(got) != 1 || got[0] != c.want):
			t.Errorf("%s: logged %q, want %q", c.name, got, c.want)
		}
	}
}

// TestRun: events emitted into the pipeline reach the log from the
// subscription, those waiting before Run started as well as those that
// arrive while it runs.
func TestRun(t *testing.T) {
	p := stoppedPipeline(t)
	h := &lines{}
	e := New(Config{Logger: slog.New(h)}, p.SubscribeEvents("event_log"))
	// Emitted before Run: waiting in the subscription.
	p.Emit(pipeline.Event{Kind: "warning_raised", Name: "a", Start: t0})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error)
	go func() { done <- e.Run(ctx) }()
	p.Emit(pipeline.Event{Kind: "warning_cleared", Name: "a", Start: t0, End: t0.Add(time.Second)})
	deadline := time.Now().Add(10 * time.Second)
	for len(h.get()) < 2 {
		if time.Now().After(deadline) {
			t.Fatalf("logged %q, want two lines", h.get())
		}
		time.Sleep(time.Millisecond)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	got := strings.Join(h.get(), "\n")
	want := "INFO warning raised rule=a severity=warning condition_since=2026-05-01T10:00:00Z\nINFO warning cleared rule=a severity=warning lasted=1s"
	if got != want {
		t.Errorf("logged\n%s\nwant\n%s", got, want)
	}
}

// TestRunSaysWhatItDropped: events the subscription had to drop are said
// once, with their number.
func TestRunSaysWhatItDropped(t *testing.T) {
	p := stoppedPipeline(t)
	sub := p.SubscribeEvents("event_log")
	for i := 0; i < 1100; i++ { // more than a subscription holds
		p.Emit(pipeline.Event{Kind: "turbo_lag", Name: "lag"})
	}
	dropped := sub.DroppedEvents()
	if dropped == 0 {
		t.Fatal("the subscription dropped nothing: the test needs more events")
	}
	h := &lines{}
	ctx, cancel := context.WithCancel(context.Background())
	cancel() // Run drains once and returns
	New(Config{Logger: slog.New(h)}, sub).Run(ctx)
	want := fmt.Sprintf("WARN the event log fell behind: events were not logged (they were recorded and published) events=%d", dropped)
	if got := h.get(); len(got) != 1 || got[0] != want {
		t.Errorf("logged %q, want %q", got, want)
	}
}
