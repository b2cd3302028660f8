package sdnotify

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
)

// listen opens a unixgram socket at name (a path, or "@name" for the
// abstract namespace) as the service manager would.
func listen(t *testing.T, name string) *net.UnixConn {
	t.Helper()
	addr := name
	if strings.HasPrefix(name, "@") {
		addr = "\x00" + name[1:]
	}
	c, err := net.ListenUnixgram("unixgram", &net.UnixAddr{Name: addr, Net: "unixgram"})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { c.Close() })
	return c
}

// recv reads one datagram, failing after a generous deadline.
func recv(t *testing.T, c *net.UnixConn) string {
	t.Helper()
	c.SetReadDeadline(time.Now().Add(5 * time.Second))
	buf := make([]byte, 4096)
	n, err := c.Read(buf)
	if err != nil {
		t.Fatalf("no datagram: %v", err)
	}
	return string(buf[:n])
}

// Every message arrives as one datagram of newline-separated assignments,
// on a path socket and on an abstract one.
func TestSend(t *testing.T) {
	for _, tc := range []struct {
		name, socket string
	}{
		{"path", filepath.Join(t.TempDir(), "notify")},
		{"abstract", fmt.Sprintf("@plenum-test-%d", time.Now().UnixNano())},
	} {
		t.Run(tc.name, func(t *testing.T) {
			srv := listen(t, tc.socket)
			n := New(Config{Socket: tc.socket})
			defer n.Close()
			if !n.Enabled() {
				t.Fatal("a notifier with a socket says it is off")
			}
			for _, step := range []struct {
				send func() error
				want string
			}{
				{func() error { return n.Ready("running\ntwo lines") }, "READY=1\nSTATUS=running two lines"},
				{n.Ping, "WATCHDOG=1"},
				{func() error { return n.Reloading("reloading") }, "RELOADING=1\nSTATUS=reloading"},
				{func() error { return n.Status("idle") }, "STATUS=idle"},
				{func() error { return n.Stopping("bye") }, "STOPPING=1\nSTATUS=bye"},
			} {
				if err := step.send(); err != nil {
					t.Fatal(err)
				}
				if got := recv(t, srv); got != step.want {
					t.Errorf("datagram %q, want %q", got, step.want)
				}
			}
		})
	}
}

// Without NOTIFY_SOCKET nothing is sent and nothing fails; a socket that
// is gone is an error naming it.
func TestAbsentSocket(t *testing.T) {
	for _, n := range []*Notifier{nil, {}, New(Config{})} {
		if n.Enabled() {
			t.Error("a notifier without a socket says it is on")
		}
		if err := n.Ready("x"); err != nil {
			t.Errorf("Ready without a socket = %v", err)
		}
		if err := n.Close(); err != nil {
			t.Errorf("Close without a socket = %v", err)
		}
	}
	gone := filepath.Join(t.TempDir(), "gone")
	err := New(Config{Socket: gone}).Ping()
	if err == nil || !strings.Contains(err.Error(), gone) {
		t.Errorf("Ping to a missing socket = %v, want an error naming %s", err, gone)
	}
}

func TestWatchdogInterval(t *testing.T) {
	for _, tc := range []struct {
		name string
		c    Config
		want time.Duration
		err  string
	}{
		{"no socket", Config{WatchdogUSec: "1000000"}, 0, ""},
		{"no watchdog", Config{Socket: "/run/x"}, 0, ""},
		{"for any process", Config{Socket: "/run/x", WatchdogUSec: "20000000"}, 20 * time.Second, ""},
		{"for this process", Config{Socket: "/run/x", WatchdogUSec: "500000", WatchdogPID: "42", PID: 42}, 500 * time.Millisecond, ""},
		{"for another process", Config{Socket: "/run/x", WatchdogUSec: "500000", WatchdogPID: "41", PID: 42}, 0, ""},
		{"bad usec", Config{Socket: "/run/x", WatchdogUSec: "2s"}, 0, "WATCHDOG_USEC"},
		{"bad pid", Config{Socket: "/run/x", WatchdogUSec: "1", WatchdogPID: "me"}, 0, "WATCHDOG_PID"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, err := tc.c.WatchdogInterval()
			if tc.err != "" {
				if err == nil || !strings.Contains(err.Error(), tc.err) {
					t.Fatalf("err = %v, want one naming %s", err, tc.err)
				}
				return
			}
			if err != nil || got != tc.want {
				t.Fatalf("WatchdogInterval = %v, %v; want %v", got, err, tc.want)
			}
		})
	}
}

func TestFromEnv(t *testing.T) {
	env := map[string]string{"NOTIFY_SOCKET": "@sock", "WATCHDOG_USEC": "3", "WATCHDOG_PID": "7"}
	got := FromEnv(func(k string) string { return env[k] }, 7)
	if want := (Config{Socket: "@sock", WatchdogUSec: "3", WatchdogPID: "7", PID: 7}); got != want {
		t.Fatalf("FromEnv = %+v, want %+v", got, want)
	}
}

// gate is a probe that answers while open and blocks while closed.
type gate struct {
	mu     sync.Mutex
	closed bool
	asked  chan struct{} // one token per probe
}

func (g *gate) probe(ctx context.Context) error {
	g.asked <- struct{}{}
	g.mu.Lock()
	closed := g.closed
	g.mu.Unlock()
	if closed {
		<-ctx.Done()
		return ctx.Err()
	}
	return nil
}

func (g *gate) set(closed bool) { g.mu.Lock(); g.closed = closed; g.mu.Unlock() }

// The watchdog pings every half interval while the probe answers, stops
// (logging once, counting every miss) while it does not, and resumes when
// it answers again. Driven by a manual clock: no real waiting.
func TestWatchdogStopsWhileStuck(t *testing.T) {
	sock := filepath.Join(t.TempDir(), "notify")
	srv := listen(t, sock)
	clk := clock.NewManual(time.Unix(0, 0))
	g := &gate{asked: make(chan struct{}, 1)}
	var logged bytes.Buffer
	var logMu sync.Mutex
	w := &Watchdog{Notifier: New(Config{Socket: sock}), Interval: 2 * time.Second, Probe: g.probe, What: "test loop",
		Clock: clk, Log: slog.New(slog.NewTextHandler(&lockedWriter{mu: &logMu, w: &logged}, nil))}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- w.Run(ctx) }()
	count := func(name string) uint64 { v, _ := w.Report().Counter(name); return v }
	// waitFor waits (with a deadline) until the watchdog sleeps on the clock
	// again with want pings and misses counted.
	waitFor := func(pings, missed uint64) {
		t.Helper()
		deadline := time.Now().Add(5 * time.Second)
		for clk.Pending() != 1 || count("pings") != pings || count("probes_unanswered") != missed {
			if time.Now().After(deadline) {
				t.Fatalf("pings %d missed %d pending %d, want %d and %d", count("pings"), count("probes_unanswered"), clk.Pending(), pings, missed)
			}
			time.Sleep(time.Millisecond)
		}
	}
	tick := func() { waitFor(count("pings"), count("probes_unanswered")); clk.Advance(time.Second) }

	waitFor(0, 0)
	for i := 1; i <= 3; i++ {
		tick()
		<-g.asked
		waitFor(uint64(i), 0)
		if got := recv(t, srv); got != "WATCHDOG=1" {
			t.Fatalf("ping %d: %q", i, got)
		}
	}
	g.set(true)
	tick() // the next probe, which blocks
	for i := 1; i <= 3; i++ {
		<-g.asked
		waitFor(3, uint64(i-1))
		clk.Advance(time.Second) // its bound passes unanswered; the next probe starts at once
	}
	<-g.asked
	waitFor(3, 3)
	srv.SetReadDeadline(time.Now()) // nothing was sent while stuck
	if n, err := srv.Read(make([]byte, 64)); err == nil {
		t.Fatalf("a datagram of %d bytes was sent while the probe was stuck", n)
	}
	if count("stalls") != 1 || w.Report().Up {
		t.Fatalf("stalls %d up %v, want one stall and down", count("stalls"), w.Report().Up)
	}
	g.set(false)
	clk.Advance(time.Second) // the stuck probe's bound passes: a fourth miss
	<-g.asked                // the next probe, answered
	waitFor(4, 4)
	if got := recv(t, srv); got != "WATCHDOG=1" {
		t.Fatalf("after recovery: %q", got)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	logMu.Lock()
	out := logged.String()
	logMu.Unlock()
	if strings.Count(out, "did not answer") != 1 || !strings.Contains(out, "answers again") {
		t.Errorf("want one stall line and one recovery line:\n%s", out)
	}
}

// A watchdog without an interval returns at once.
func TestWatchdogOff(t *testing.T) {
	w := &Watchdog{Probe: func(context.Context) error { return errors.New("never asked") }}
	if err := w.Run(context.Background()); err != nil {
		t.Fatal(err)
	}
	if v, _ := w.Report().Counter("pings"); v != 0 {
		t.Fatal(v)
	}
}

type lockedWriter struct {
	mu *sync.Mutex
	w  *bytes.Buffer
}

func (l *lockedWriter) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(p)
}

// FuzzWatchdogInterval: the environment's values never panic the parse, a
// malformed one is an error naming its variable, and an interval comes
// only for this process.
func FuzzWatchdogInterval(f *testing.F) {
	for _, s := range [][2]string{{"20000000", ""}, {"500000", "42"}, {"1", "41"}, {"-5", ""}, {"2s", "x"}, {"18446744073709551615", "42"}, {"9223372036854775", ""}, {"9223372036854776", ""}} {
		f.Add(s[0], s[1])
	}
	f.Fuzz(func(t *testing.T, usec, pid string) {
		iv, err := Config{Socket: "@s", WatchdogUSec: usec, WatchdogPID: pid, PID: 42}.WatchdogInterval()
		if err != nil {
			if !strings.Contains(err.Error(), "WATCHDOG_") {
				t.Fatalf("error %v names no variable", err)
			}
			return
		}
		if iv < 0 {
			t.Fatalf("negative interval %v", iv)
		}
		if iv > 0 && pid != "" && pid != "42" && strings.TrimLeft(pid, "+0") != "42" {
			t.Fatalf("an interval %v for WATCHDOG_PID=%q, not this process", iv, pid)
		}
	})
}
