package retention

import (
	"bytes"
	"context"
	"encoding/json"
	"log/slog"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline/record"
)

var t0 = time.Date(2026, 5, 1, 12, 0, 0, 0, time.UTC)

const day = 24 * time.Hour

func TestDecide(t *testing.T) {
	// Five runs a day apart, 100 bytes each (a oldest), e being recorded.
	runs := func(mod func([]Run)) []Run {
		rs := []Run{
			{ID: "a", Start: t0.Add(-4 * day), Bytes: 100, Pushed: true},
			{ID: "b", Start: t0.Add(-3 * day), Bytes: 100, Pushed: true},
			{ID: "c", Start: t0.Add(-2 * day), Bytes: 100, Pushed: true},
			{ID: "d", Start: t0.Add(-1 * day), Bytes: 100, Pushed: true},
			{ID: "e", Start: t0, Bytes: 100, Pushed: false, Current: true},
		}
		if mod != nil {
			mod(rs)
		}
		return rs
	}
	type rm struct{ id, reason string }
	type hd struct{ id, reason, limit string }
	cases := []struct {
		name     string
		runs     []Run
		p        Policy
		needFree int64
		remove   []rm
		held     []hd
	}{
		{"zero policy removes nothing", runs(nil), Policy{}, 0, nil, nil},
		{"within every limit", runs(nil), Policy{MaxTotalBytes: 500, MaxAge: 5 * day}, 0, nil, nil},
		{"age: older than 2.5 days", runs(nil), Policy{MaxAge: 60 * time.Hour}, 0,
			[]rm{{"a", ReasonAge}, {"b", ReasonAge}}, nil},
		{"age exactly at the limit stays", runs(nil), Policy{MaxAge: 3 * day}, 0,
			[]rm{{"a", ReasonAge}}, nil},
		{"total: 500 bytes into 250, oldest first", runs(nil), Policy{MaxTotalBytes: 250}, 0,
			[]rm{{"a", ReasonTotalSize}, {"b", ReasonTotalSize}, {"c", ReasonTotalSize}}, nil},
		{"age first, then total", runs(nil), Policy{MaxAge: 84 * time.Hour, MaxTotalBytes: 300}, 0,
			[]rm{{"a", ReasonAge}, {"b", ReasonTotalSize}}, nil},
		{"never the current run, even alone over the limit", runs(nil), Policy{MaxTotalBytes: 50}, 0,
			[]rm{{"a", ReasonTotalSize}, {"b", ReasonTotalSize}, {"c", ReasonTotalSize}, {"d", ReasonTotalSize}},
			[]hd{{"e", HeldCurrent, ReasonTotalSize}}},
		{"pushing on: an unpushed run is held, the next one goes instead",
			runs(func(rs []Run) { rs[0].Pushed = false }), Policy{MaxTotalBytes: 350, NeedPushed: true}, 0,
			[]rm{{"b", ReasonTotalSize}, {"c", ReasonTotalSize}},
			[]hd{{"a", HeldUnpushed, ReasonTotalSize}}},
		{"pushing off: pushed does not matter",
			runs(func(rs []Run) { rs[0].Pushed = false }), Policy{MaxTotalBytes: 350}, 0,
			[]rm{{"a", ReasonTotalSize}, {"b", ReasonTotalSize}}, nil},
		{"pushing on, nothing pushed: everything held",
			runs(func(rs []Run) {
				for i := range rs {
					rs[i].Pushed = false
				}
			}), Policy{MaxAge: 36 * time.Hour, NeedPushed: true}, 0, nil,
			[]hd{{"a", HeldUnpushed, ReasonAge}, {"b", HeldUnpushed, ReasonAge}, {"c", HeldUnpushed, ReasonAge}}},
		{"free space: 150 bytes wanted, two runs go", runs(nil), Policy{MaxAge: 10 * day}, 150,
			[]rm{{"a", ReasonFreeSpace}, {"b", ReasonFreeSpace}}, nil},
		{"free space with limits met otherwise", runs(nil), Policy{MaxTotalBytes: 1000}, 1,
			[]rm{{"a", ReasonFreeSpace}}, nil},
		{"free space, unpushed held", runs(func(rs []Run) { rs[0].Pushed = false }), Policy{NeedPushed: true}, 100,
			[]rm{{"b", ReasonFreeSpace}}, []hd{{"a", HeldUnpushed, ReasonFreeSpace}}},
		{"free space beyond every run: all but the current", runs(nil), Policy{}, 10_000,
			[]rm{{"a", ReasonFreeSpace}, {"b", ReasonFreeSpace}, {"c", ReasonFreeSpace}, {"d", ReasonFreeSpace}},
			[]hd{{"e", HeldCurrent, ReasonFreeSpace}}},
		{"order by start, not by the list's order",
			[]Run{{ID: "new", Start: t0, Bytes: 10, Pushed: true}, {ID: "old", Start: t0.Add(-day), Bytes: 10, Pushed: true}},
			Policy{MaxTotalBytes: 15}, 0, []rm{{"old", ReasonTotalSize}}, nil},
		{"no runs", nil, Policy{MaxTotalBytes: 1, MaxAge: time.Second}, 100, nil, nil},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			remove, held := Decide(c.runs, c.p, t0, c.needFree)
			var gotR []rm
			for _, r := range remove {
				gotR = append(gotR, rm{r.Run.ID, r.Reason})
				if want := t0.Sub(r.Run.Start); r.Age != want {
					t.Errorf("%s: age %v, want %v", r.Run.ID, r.Age, want)
				}
			}
			var gotH []hd
			for _, h := range held {
				gotH = append(gotH, hd{h.Run.ID, h.Reason, h.Limit})
			}
			if !slices.Equal(gotR, c.remove) {
				t.Errorf("remove %v, want %v", gotR, c.remove)
			}
			if !slices.Equal(gotH, c.held) {
				t.Errorf("held %v, want %v", gotH, c.held)
			}
		})
	}
}

// mkRun makes a run directory with run.json and a data file of n bytes.
func mkRun(t *testing.T, dir, id string, start time.Time, n int, pushed bool) {
	t.Helper()
	rd := filepath.Join(dir, id)
	if err := os.MkdirAll(rd, 0o755); err != nil {
		t.Fatal(err)
	}
	m, _ := json.Marshal(record.Meta{ID: id, Vehicle: "v", Start: start})
	os.WriteFile(filepath.Join(rd, "run.json"), m, 0o644)
	os.WriteFile(filepath.Join(rd, "0001.lp.gz"), bytes.Repeat([]byte{'x'}, n), 0o644)
	if pushed {
		if err := record.MarkPushed(rd, true); err != nil {
			t.Fatal(err)
		}
	}
}

// syncLog is a log the test can read while the keeper writes it.
type syncLog struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *syncLog) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *syncLog) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// TestKeeper runs the keeper on real run directories with a manual clock:
// removals by age as the clock moves, each logged with run, age, size and
// reason; an unpushed run held and logged once; the current run kept; the
// free-space guard honoured; a cut removal's leftover cleared.
func TestKeeper(t *testing.T) {
	dir := t.TempDir()
	clk := clock.NewManual(t0)
	mkRun(t, dir, "r1", t0.Add(-50*time.Hour), 1000, true)
	mkRun(t, dir, "r2", t0.Add(-30*time.Hour), 1000, false) // not pushed
	mkRun(t, dir, "r3", t0.Add(-10*time.Hour), 1000, true)
	mkRun(t, dir, "r4", t0.Add(-1*time.Hour), 1000, false) // being recorded
	os.MkdirAll(filepath.Join(dir, ".removing-r0", "x"), 0o755)
	os.WriteFile(filepath.Join(dir, "not-a-run.txt"), []byte("x"), 0o644)
	var free uint64 = 1 << 30
	var fmu sync.Mutex
	var log syncLog
	k := New(Config{
		Dir: dir, Policy: Policy{MaxAge: 48 * time.Hour, NeedPushed: true},
		MinFreeBytes: 1 << 20, Every: time.Minute, Clock: clk,
		Current: func() string { return "r4" },
		DiskSpace: func(string) (uint64, uint64, error) {
			fmu.Lock()
			defer fmu.Unlock()
			return free, 1 << 32, nil
		},
		Log: slog.New(slog.NewTextHandler(&log, nil)),
	})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error)
	go func() { done <- k.Run(ctx) }()
	waitFor := func(what string, cond func() bool) {
		t.Helper()
		deadline := time.Now().Add(10 * time.Second)
		for !cond() {
			if time.Now().After(deadline) {
				t.Fatalf("timed out waiting for %s; log:\n%s", what, log.String())
			}
			time.Sleep(2 * time.Millisecond)
		}
	}
	gone := func(id string) bool { _, err := os.Stat(filepath.Join(dir, id)); return os.IsNotExist(err) }
	counter := func(name string) uint64 { n, _ := k.Report().Counter(name); return n }
	gauge := func(name string) float64 { v, _ := k.Report().Gauge(name); return v }

	// The first pass: r1 is over 48 h and pushed.
	waitFor("r1 removed", func() bool { return gone("r1") && counter("removed_runs") == 1 })
	if !gone(".removing-r0") {
		t.Error("the leftover of a cut removal is still there")
	}
	if s := log.String(); !strings.Contains(s, "run=r1") || !strings.Contains(s, "reason=age") ||
		!strings.Contains(s, "bytes=1") || !strings.Contains(s, "age=50h0m0s") {
		t.Errorf("the removal's log lacks run, age, size or reason:\n%s", s)
	}

	// 20 h later r2 is over the age but not pushed: held, logged once. The
	// keeper waits on the clock once its first pass is done.
	waitFor("the keeper waiting on the clock", func() bool { return clk.Pending() > 0 })
	clk.Advance(20 * time.Hour)
	waitFor("r2 held", func() bool { return gauge("held_unpushed_runs") == 1 })
	for range 3 { // more passes, as the minutes go by
		if _, err := k.Pass(); err != nil {
			t.Fatal(err)
		}
	}
	if gone("r2") || counter("held_unpushed") != 1 || strings.Count(log.String(), "run=r2") != 1 {
		t.Errorf("r2 gone %v, held_unpushed %d; log:\n%s", gone("r2"), counter("held_unpushed"), log.String())
	}
	if k.Report().Up {
		t.Error("up while a run over the limit is held unpushed")
	}
	// Pushed now: it goes at the next pass.
	record.MarkPushed(filepath.Join(dir, "r2"), true)
	k.Kick()
	waitFor("r2 removed", func() bool { return gone("r2") })
	waitFor("nothing held", func() bool { return gauge("held_unpushed_runs") == 0 })

	// The disk runs low: the oldest run that may go goes, never r4.
	fmu.Lock()
	free = 1 << 10
	fmu.Unlock()
	k.Kick()
	waitFor("r3 removed for free space, logged", func() bool {
		return gone("r3") && strings.Contains(log.String(), "run=r3") && strings.Contains(log.String(), "reason=free_space")
	})
	if _, err := k.Pass(); err != nil { // still low: nothing else may go
		t.Fatal(err)
	}
	if gone("r4") {
		t.Fatal("the current run was removed")
	}
	if _, err := os.Stat(filepath.Join(dir, "not-a-run.txt")); err != nil {
		t.Error("a file that is not a run was removed")
	}
	cancel()
	<-done
	if n := counter("removed_runs"); n != 3 {
		t.Errorf("removed_runs = %d, want 3", n)
	}
	if n := counter("removed_bytes"); n < 3000 {
		t.Errorf("removed_bytes = %d, want at least 3000", n)
	}
	if g := gauge("runs"); g != 1 {
		t.Errorf("runs gauge = %v, want 1", g)
	}
}
