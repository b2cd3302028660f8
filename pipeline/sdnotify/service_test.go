package sdnotify

import (
	"bytes"
	"context"
	"errors"
	"log/slog"
	"os"
	"path/filepath"
	"sync"
	"testing"
)

// newTestService returns a Service notifying srv's socket and logging,
// without times, to the returned buffer under level.
func newTestService(t *testing.T, level *slog.LevelVar) (*Service, *bytes.Buffer, func() string) {
	t.Helper()
	sock := filepath.Join(t.TempDir(), "notify")
	srv := listen(t, sock)
	var logged bytes.Buffer
	var mu sync.Mutex
	h := slog.NewTextHandler(&lockedWriter{mu: &mu, w: &logged}, &slog.HandlerOptions{Level: level,
		ReplaceAttr: func(groups []string, a slog.Attr) slog.Attr {
			if a.Key == slog.TimeKey && len(groups) == 0 {
				return slog.Attr{}
			}
			return a
		}})
	s := NewService(Config{Socket: sock}, slog.New(h))
	t.Cleanup(func() { s.Notifier.Close() })
	return s, &logged, func() string { return recv(t, srv) }
}

// Each reload sits between RELOADING=1 and READY=1; what came of it is
// counted (applied, refused; up while the file is what runs) and logged
// with the lines the daemon has always written. An applied log_level is
// set, and the line saying so is written under the less strict of the two
// levels.
func TestServiceReloads(t *testing.T) {
	type result struct {
		r   Reloaded
		err error
	}
	const path = "/etc/plenum/plenum.yaml"
	for _, tc := range []struct {
		name             string
		results          []result // Reload's answers in turn; nil: Reload unset
		level, after     slog.Level
		applied, refused uint64
		up               bool
		log              string
	}{
		{"applied, level raised", []result{{Reloaded{Changed: []string{"log_level"}, Level: slog.LevelWarn}, nil}},
			slog.LevelInfo, slog.LevelWarn, 1, 0, true,
			"level=INFO msg=\"reload applied\" config=" + path + " changed=log_level log_level=WARN\n"},
		{"applied, level lowered", []result{{Reloaded{Changed: []string{"log_level", "http.title"}, Level: slog.LevelDebug}, nil}},
			slog.LevelWarn, slog.LevelDebug, 1, 0, true,
			"level=INFO msg=\"reload applied\" config=" + path + " changed=log_level,http.title log_level=DEBUG\n"},
		{"unchanged", []result{{Reloaded{Level: slog.LevelInfo}, nil}},
			slog.LevelInfo, slog.LevelInfo, 1, 0, true,
			"level=INFO msg=\"reload: the configuration is unchanged\" config=" + path + "\n"},
		{"refused", []result{{err: &Refusal{Why: "http.listen changed: restart needed"}}},
			slog.LevelInfo, slog.LevelInfo, 0, 1, false,
			"level=ERROR msg=\"reload refused: http.listen changed: restart needed; running on with the configuration loaded before\" config=" + path + "\n"},
		{"failing check", []result{{err: &Refusal{Why: "the new file does not pass the check", Err: errors.New("plenum.yaml:7: log_level: loud")}}},
			slog.LevelInfo, slog.LevelInfo, 0, 1, false,
			"level=ERROR msg=\"reload refused: the new file does not pass the check; running on with the configuration loaded before\" config=" + path + " err=\"plenum.yaml:7: log_level: loud\"\n"},
		{"plain error", []result{{err: errors.New("the disk is gone")}},
			slog.LevelInfo, slog.LevelInfo, 0, 1, false,
			"level=ERROR msg=\"reload refused: the disk is gone; running on with the configuration loaded before\" config=" + path + "\n"},
		{"no Reload", nil,
			slog.LevelInfo, slog.LevelInfo, 0, 1, false,
			"level=ERROR msg=\"reload refused: this daemon cannot reload its configuration; running on with the configuration loaded before\" config=" + path + "\n"},
		{"refused, then applied: up again", []result{{err: &Refusal{Why: "mqtt.broker changed: restart needed"}}, {Reloaded{Level: slog.LevelInfo}, nil}},
			slog.LevelInfo, slog.LevelInfo, 1, 1, true,
			"level=ERROR msg=\"reload refused: mqtt.broker changed: restart needed; running on with the configuration loaded before\" config=" + path + "\n" +
				"level=INFO msg=\"reload: the configuration is unchanged\" config=" + path + "\n"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			level := new(slog.LevelVar)
			level.Set(tc.level)
			s, logged, next := newTestService(t, level)
			reloads := make(chan os.Signal)
			s.Status, s.ConfigPath, s.Reloads, s.Level = "running: test", path, reloads, level
			if tc.results != nil {
				n := 0
				s.Reload = func() (Reloaded, error) { r := tc.results[n]; n++; return r.r, r.err }
			}
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan error, 1)
			go func() { done <- s.Run(ctx) }()
			if got := next(); got != "READY=1\nSTATUS=running: test" {
				t.Fatalf("first datagram %q", got)
			}
			for i := range max(len(tc.results), 1) {
				reloads <- os.Interrupt
				if got := next(); got != "RELOADING=1\nSTATUS=reloading "+path {
					t.Fatalf("reload %d: %q, want RELOADING=1", i, got)
				}
				if got := next(); got != "READY=1\nSTATUS=running: test" {
					t.Fatalf("reload %d: %q, want READY=1", i, got)
				}
			}
			cancel()
			if got := next(); got != "STOPPING=1\nSTATUS=stopping: flushing and closing" {
				t.Fatalf("at the end %q", got)
			}
			if err := <-done; err != nil {
				t.Fatalf("Run = %v", err)
			}
			rep := s.Report()
			applied, _ := rep.Counter("applied")
			refused, _ := rep.Counter("refused")
			if rep.Kind != "reload" || rep.Name != "config" || applied != tc.applied || refused != tc.refused || rep.Up != tc.up {
				t.Errorf("report %+v, want reload/config applied %d refused %d up %v", rep, tc.applied, tc.refused, tc.up)
			}
			if got := logged.String(); got != tc.log {
				t.Errorf("log:\n%s\nwant:\n%s", got, tc.log)
			}
			if level.Level() != tc.after {
				t.Errorf("log level %v after, want %v", level.Level(), tc.after)
			}
		})
	}
}

// READY=1 waits for every Started part and then for the probe; a daemon
// stopped before either sends only STOPPING=1.
func TestServiceReady(t *testing.T) {
	for _, tc := range []struct {
		name    string
		started int  // of the two parts
		answer  bool // the probe answers (else it waits for the end)
		want    []string
	}{
		{"a part never ran", 1, true, []string{"STOPPING=1\nSTATUS=stopping: flushing and closing"}},
		{"the probe did not answer", 2, false, []string{"STOPPING=1\nSTATUS=stopping: flushing and closing"}},
		{"ready", 2, true, []string{"READY=1\nSTATUS=running: test", "STOPPING=1\nSTATUS=stopping: flushing and closing"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s, logged, next := newTestService(t, new(slog.LevelVar))
			s.Status = "running: test"
			probed := make(chan struct{}, 1)
			s.Probe = func(ctx context.Context) error {
				probed <- struct{}{}
				if tc.answer {
					return nil
				}
				<-ctx.Done()
				return ctx.Err()
			}
			ctx, cancel := context.WithCancel(context.Background())
			defer cancel()
			ran := make(chan struct{}, 2)
			parts := []func(context.Context) error{
				s.Started(func(context.Context) error { ran <- struct{}{}; return nil }),
				s.Started(func(context.Context) error { ran <- struct{}{}; return nil }),
			}
			done := make(chan error, 1)
			go func() { done <- s.Run(ctx) }()
			for _, p := range parts[:tc.started] {
				go p(ctx)
				<-ran
			}
			if tc.started == len(parts) {
				<-probed // Run got as far as the probe
			}
			if tc.answer && tc.started == len(parts) {
				if got := next(); got != tc.want[0] {
					t.Fatalf("got %q, want %q", got, tc.want[0])
				}
			}
			cancel()
			if err := <-done; err != nil {
				t.Fatalf("Run = %v", err)
			}
			if got, want := next(), tc.want[len(tc.want)-1]; got != want {
				t.Fatalf("got %q, want %q (nothing before it)", got, want)
			}
			if tc.started < len(parts) && len(probed) != 0 {
				t.Error("probed before every part ran")
			}
			if logged.Len() != 0 {
				t.Errorf("logged %q", logged.String())
			}
		})
	}
}

// NewService gives the watchdog the service manager's interval, and none,
// with the reason logged, when the settings cannot be read.
func TestNewServiceWatchdog(t *testing.T) {
	for _, tc := range []struct {
		name string
		c    Config
		ms   int64
		log  bool
	}{
		{"asked for", Config{Socket: "@s", WatchdogUSec: "400000"}, 400, false},
		{"none", Config{Socket: "@s"}, 0, false},
		{"unreadable", Config{Socket: "@s", WatchdogUSec: "2s"}, 0, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var logged bytes.Buffer
			s := NewService(tc.c, slog.New(slog.NewTextHandler(&logged, nil)))
			if got := s.Watchdog.Interval.Milliseconds(); got != tc.ms || s.Watchdog.Notifier != s.Notifier {
				t.Errorf("watchdog interval %d ms, want %d, on the service's notifier", got, tc.ms)
			}
			if has := bytes.Contains(logged.Bytes(), []byte(`msg="the service manager's watchdog settings cannot be read; no watchdog pings" err="WATCHDOG_USEC=`)); has != tc.log {
				t.Errorf("logged %q", logged.String())
			}
		})
	}
}
