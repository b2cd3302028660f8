package main

import (
	"context"
	"fmt"
	"log/slog"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
)

// logLines is a slog.Handler at info level that keeps each record as one
// line: "LEVEL message key=value …" (attributes given to With included).
type logLines struct {
	mu    *sync.Mutex
	lines *[]string
	attrs string
}

func newLogLines() logLines { return logLines{mu: new(sync.Mutex), lines: new([]string)} }

func (h logLines) Enabled(_ context.Context, l slog.Level) bool { return l >= slog.LevelInfo }

func (h logLines) Handle(_ context.Context, r slog.Record) error {
	s := r.Level.String() + " " + r.Message + h.attrs
	r.Attrs(func(a slog.Attr) bool { s += fmt.Sprintf(" %s=%v", a.Key, a.Value); return true })
	h.mu.Lock()
	*h.lines = append(*h.lines, s)
	h.mu.Unlock()
	return nil
}

func (h logLines) WithAttrs(as []slog.Attr) slog.Handler {
	for _, a := range as {
		h.attrs += fmt.Sprintf(" %s=%v", a.Key, a.Value)
	}
	return h
}

func (h logLines) WithGroup(string) slog.Handler { return h }

func (h logLines) get() []string {
	h.mu.Lock()
	defer h.mu.Unlock()
	return slices.Clone(*h.lines)
}

// has tells whether a line starts with prefix.
func (h logLines) has(prefix string) bool {
	return slices.ContainsFunc(h.get(), func(s string) bool { return strings.HasPrefix(s, prefix) })
}

// TestCleanShutdownLogsNoWarning runs the demo daemon, recording, until its
// publisher is connected, a run is being recorded and the cold engine's
// warning has been raised and cleared, then stops it as SIGTERM does. The
// log says, at info level, that the run started and stopped and that the
// warning was raised and cleared, and has no warning or error.
func TestCleanShutdownLogsNoWarning(t *testing.T) {
	cfg, err := config.Parse("demo.yaml", demoConfig)
	if err != nil {
		t.Fatal(err)
	}
	cfg.HTTP.Listen, cfg.MQTT.Listen = "127.0.0.1:0", "127.0.0.1:0"
	cfg.StateDir, cfg.Record.Dir = t.TempDir(), t.TempDir() // a cold engine
	cfg.Sim.TimeScale = 20                                  // the rev on a cold engine within about a second
	logs := newLogLines()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- runDaemon(ctx, cfg, &syncBuffer{}, slog.New(logs)) }()
	deadline := time.Now().Add(20 * time.Second)
	for !(logs.has("INFO mqtt connected") && logs.has("INFO run started") && logs.has("INFO device open") &&
		logs.has("INFO warning cleared rule=cold_engine_high_load")) {
		select {
		case err := <-done:
			t.Fatalf("the daemon stopped early: %v\n%s", err, strings.Join(logs.get(), "\n"))
		case <-time.After(5 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			t.Fatalf("the daemon did not connect and start recording:\n%s", strings.Join(logs.get(), "\n"))
		}
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("a clean stop returned %v", err)
	}
	lines := logs.get()
	for _, l := range lines {
		if !strings.HasPrefix(l, "INFO ") {
			t.Errorf("a clean shutdown logged %q", l)
		}
	}
	for _, want := range []string{"INFO run started run=", "INFO warning raised rule=cold_engine_high_load severity=warning",
		"INFO warning cleared rule=cold_engine_high_load", "INFO shutting down", "INFO run stopped run="} {
		if !logs.has(want) {
			t.Errorf("the log lacks %q:\n%s", want, strings.Join(lines, "\n"))
		}
	}
}
