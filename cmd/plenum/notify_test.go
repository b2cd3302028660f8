package main

import (
	"bufio"
	"context"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/sdnotify"
)

// stallDeriv is a derivation on engine speed that, while stall is set,
// blocks inside Derive until released: the ingest loop really stops.
type stallDeriv struct {
	stall   atomic.Bool
	entered chan struct{} // one token when it starts blocking
	release chan struct{}
}

func (d *stallDeriv) Name() string                { return "test_stall" }
func (d *stallDeriv) Inputs() []pipeline.Input    { return []pipeline.Input{{Name: "engine_speed"}} }
func (d *stallDeriv) Outputs() []pipeline.Channel { return nil }
func (d *stallDeriv) Derive(time.Time, []float64, []float64) uint64 {
	if d.stall.Load() {
		d.entered <- struct{}{}
		<-d.release
		d.stall.Store(false)
	}
	return 0
}

// notifications collects the datagrams sent to a test NOTIFY_SOCKET.
type notifications struct {
	conn *net.UnixConn
	mu   sync.Mutex
	msgs []string
	more chan struct{} // a token per datagram
}

func listenNotify(t *testing.T) *notifications {
	t.Helper()
	path := filepath.Join(t.TempDir(), "notify")
	c, err := net.ListenUnixgram("unixgram", &net.UnixAddr{Name: path, Net: "unixgram"})
	if err != nil {
		t.Fatal(err)
	}
	n := &notifications{conn: c, more: make(chan struct{}, 1<<12)}
	go func() {
		buf := make([]byte, 4096)
		for {
			k, err := c.Read(buf)
			if err != nil {
				return
			}
			n.mu.Lock()
			n.msgs = append(n.msgs, string(buf[:k]))
			n.mu.Unlock()
			n.more <- struct{}{}
		}
	}()
	t.Cleanup(func() { c.Close() })
	return n
}

func (n *notifications) path() string { return n.conn.LocalAddr().String() }

func (n *notifications) all() []string {
	n.mu.Lock()
	defer n.mu.Unlock()
	return append([]string(nil), n.msgs...)
}

// waitFor waits until a datagram from index from on holds want, and
// returns the index after it.
func (n *notifications) waitFor(t *testing.T, from int, want string) int {
	t.Helper()
	deadline := time.After(20 * time.Second)
	for {
		msgs := n.all()
		for i := from; i < len(msgs); i++ {
			if strings.Contains(msgs[i], want) {
				return i + 1
			}
		}
		select {
		case <-n.more:
		case <-deadline:
			t.Fatalf("no datagram with %q after #%d; got %q", want, from, msgs)
		}
	}
}

// series reads one series of the daemon's /metrics.
func series(t *testing.T, base, series string) float64 {
	t.Helper()
	resp, err := http.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		if v, ok := strings.CutPrefix(sc.Text(), series+" "); ok {
			f, err := strconv.ParseFloat(v, 64)
			if err != nil {
				t.Fatal(err)
			}
			return f
		}
	}
	t.Fatalf("no series %s in /metrics", series)
	return 0
}

// TestDaemonNotifiesServiceManager runs the demo daemon in-process under a
// test NOTIFY_SOCKET with a 400 ms watchdog: it sends READY=1, then
// WATCHDOG=1 every 200 ms; while a derivation blocks the ingest loop it
// sends no WATCHDOG=1 (one stall logged and counted, every unanswered
// probe counted); released, it pings again. SIGHUP reloads: log_level is
// applied, a changed listener and an invalid file are refused, each
// between RELOADING=1 and READY=1. The shutdown sends STOPPING=1.
func TestDaemonNotifiesServiceManager(t *testing.T) {
	dir := t.TempDir()
	text := strings.Replace(strings.Replace(string(demoConfig), "listen: 127.0.0.1:1883", "listen: 127.0.0.1:0", 1),
		"listen: 127.0.0.1:9108", "listen: 127.0.0.1:0", 1) + "state_dir: " + dir + "\n"
	file := filepath.Join(dir, "plenum.yaml")
	write := func(s string) {
		if err := os.WriteFile(file, []byte(s), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	write(text)
	cfg, err := config.Load(file)
	if err != nil {
		t.Fatal(err)
	}
	notify := listenNotify(t)
	stall := &stallDeriv{entered: make(chan struct{}, 1), release: make(chan struct{})}
	hup := make(chan os.Signal, 1)
	svc := service{notify: sdnotify.Config{Socket: notify.path(), WatchdogUSec: "400000", WatchdogPID: "4242", PID: 4242},
		reload: hup, configPath: file, derivations: []pipeline.Derivation{stall}}
	logs := newLogLines()
	stdout := &syncBuffer{}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- runDaemonWith(ctx, cfg, stdout, slog.New(logs), svc) }()
	defer func() {
		if t.Failed() {
			t.Logf("log:\n%s", strings.Join(logs.get(), "\n"))
		}
	}()

	at := notify.waitFor(t, 0, "READY=1\nSTATUS=running: vehicle brackenfell-rs")
	at = notify.waitFor(t, at, "WATCHDOG=1")
	notify.waitFor(t, at, "WATCHDOG=1")
	base := regexp.MustCompile(`metrics:  (http://\S+)/metrics`).FindStringSubmatch(stdout.String())
	if base == nil {
		t.Fatalf("no metrics address in\n%s", stdout.String())
	}
	pings := func() float64 { return series(t, base[1], `plenum_watchdog_pings_total{watchdog="service"}`) }
	missed := func() float64 {
		return series(t, base[1], `plenum_watchdog_probes_unanswered_total{watchdog="service"}`)
	}

	// Block the ingest loop inside a frame.
	stall.stall.Store(true)
	<-stall.entered
	waitUntil(t, 20*time.Second, "the watchdog to miss a probe while the ingest loop is blocked", func() (bool, string) {
		return missed() >= 1, fmt.Sprintf("%v probes unanswered", missed())
	})
	before := pings()
	// Four more half-intervals: two whole watchdog timeouts.
	waitUntil(t, 20*time.Second, "the watchdog to go on probing", func() (bool, string) {
		return missed() >= 4, fmt.Sprintf("%v probes unanswered", missed())
	})
	if after := pings(); after != before {
		t.Fatalf("%v pings were counted while the ingest loop was blocked", after-before)
	}
	// Every datagram sent so far is queued before this marker.
	marker, err := net.DialUnix("unixgram", nil, &net.UnixAddr{Name: notify.path(), Net: "unixgram"})
	if err != nil {
		t.Fatal(err)
	}
	marker.Write([]byte("TEST-MARKER=1\n"))
	marker.Close()
	at = notify.waitFor(t, 0, "TEST-MARKER=1")
	sent := 0
	for _, m := range notify.all()[:at] {
		if m == "WATCHDOG=1" {
			sent++
		}
	}
	if float64(sent) != before {
		t.Fatalf("%d WATCHDOG=1 datagrams arrived, %v pings were counted before the stall: pings went on while blocked", sent, before)
	}
	if series(t, base[1], `plenum_watchdog_stalls_total{watchdog="service"}`) != 1 || series(t, base[1], `plenum_watchdog_up{watchdog="service"}`) != 0 {
		t.Error("the stall is not counted once with the watchdog down")
	}
	stalledLines := 0
	for _, l := range logs.get() {
		if strings.HasPrefix(l, "ERROR the ingest loop did not answer the watchdog's probe in time") {
			stalledLines++
		}
	}
	if stalledLines != 1 {
		t.Errorf("the stall was logged %d times, want once", stalledLines)
	}

	// Released, the loop answers again and the pings resume.
	close(stall.release)
	at = notify.waitFor(t, at, "WATCHDOG=1")
	if !logs.has("WARN the ingest loop answers again; watchdog pings resume") {
		t.Error("the recovery is not logged")
	}

	// Reloads, each between RELOADING=1 and READY=1.
	for _, tc := range []struct {
		name, file, log string
	}{
		{"log level", text + "log_level: warn\n", "INFO reload applied config=" + file + " changed=log_level log_level=WARN"},
		{"listener", strings.Replace(text, "listen: 127.0.0.1:0\ncan:", "listen: 127.0.0.1:9999\ncan:", 1) + "log_level: warn\n",
			"ERROR reload refused: http.listen changed: restart needed; running on"},
		{"invalid", text + "log_level: loud\n", "ERROR reload refused: the new file does not pass the check; running on"},
	} {
		write(tc.file)
		hup <- os.Interrupt // any signal value: the channel is the request
		at = notify.waitFor(t, at, "RELOADING=1")
		at = notify.waitFor(t, at, "READY=1")
		if !logs.has(tc.log) {
			t.Errorf("%s: the log lacks %q", tc.name, tc.log)
		}
	}
	if series(t, base[1], `plenum_reload_applied_total{reload="config"}`) != 1 || series(t, base[1], `plenum_reload_refused_total{reload="config"}`) != 2 {
		t.Error("reloads not counted: want 1 applied, 2 refused")
	}

	cancel()
	notify.waitFor(t, at, "STOPPING=1")
	if err := <-done; err != nil {
		t.Fatalf("the daemon stopped with %v", err)
	}
	if n := strings.Count(strings.Join(notify.all(), ""), "READY=1"); n != 4 {
		t.Errorf("READY=1 sent %d times, want once at start and once after each of 3 reloads", n)
	}
}
