package record

import (
	"bytes"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record/recordtest"
)

// createOn is Config.Create for a test disk.
func createOn(d *recordtest.Disk) func(string) (File, error) {
	return func(path string) (File, error) { return d.Create(path) }
}

// fakeClock is a clock moved by hand.
type fakeClock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *fakeClock) now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *fakeClock) add(d time.Duration) {
	c.mu.Lock()
	c.t = c.t.Add(d)
	c.mu.Unlock()
}

// lines counts the sample lines and the lines of one event kind in b, and
// fails on a torn line.
func lines(t *testing.T, b []byte, kind string) (samples, events int, ev []string) {
	t.Helper()
	if len(b) > 0 && b[len(b)-1] != '\n' {
		t.Fatalf("the data ends in a torn line: …%q", b[max(0, len(b)-80):])
	}
	for _, l := range strings.Split(strings.TrimSuffix(string(b), "\n"), "\n") {
		switch {
		case l == "":
		case strings.HasPrefix(l, "plenum,"):
			samples++
		case strings.HasPrefix(l, "plenum_event,kind="+kind+","):
			events++
			ev = append(ev, l)
		}
	}
	return samples, events, ev
}

// TestDiskRefusesThenResumes: a disk that fills up mid-run is retried with
// backoff and written to again once it has room; a block it took in part
// is cut back; while it refuses, 16 MiB are held and the rest is counted
// as lost; the gap is written into the run as an event once writing works
// again; the summary and Close say what was written and what was lost.
func TestDiskRefusesThenResumes(t *testing.T) {
	dir := t.TempDir()
	disk := recordtest.NewDisk(100_000)
	clk := &fakeClock{t: time.Unix(5000, 0)}
	r, err := Open(Config{Dir: dir, Run: "full", Vehicle: "v", Create: createOn(disk), Now: clk.now}, testRegistry(t))
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Unix(1000, 0)
	i := 0
	put := func(n int) {
		for range n {
			r.Write(pipeline.Sample{Channel: pipeline.ChannelID(i & 1), Value: float64(i), Time: t0.Add(time.Duration(i) * time.Millisecond)})
			i++
		}
	}
	put(500)
	if err := r.Sync(); err != nil || r.Refusing() {
		t.Fatalf("sync with room: %v (refusing %v)", err, r.Refusing())
	}
	before := disk.Data("0001.lp")
	put(5000) // more than the 100 kB of room, in one block
	err = r.Sync()
	if !errors.Is(err, syscall.ENOSPC) || !r.Refusing() || r.WriteFailures() != 1 {
		t.Fatalf("first refused write: err %v, refusing %v, failures %d", err, r.Refusing(), r.WriteFailures())
	}
	if got := disk.Data("0001.lp"); !bytes.Equal(got, before) {
		t.Fatalf("a part-written block was left in the file: %d bytes, %d before", len(got), len(before))
	}
	if r.Lost() != 0 {
		t.Fatalf("lost %d while holding less than 16 MiB", r.Lost())
	}

	// Backoff: no write is tried before the retry is due; then 100 ms,
	// 200 ms, 400 ms … up to 2 s.
	for _, step := range []struct {
		wait  time.Duration
		tried bool
	}{{50 * time.Millisecond, false}, {50 * time.Millisecond, true}, {100 * time.Millisecond, false}, {100 * time.Millisecond, true},
		{300 * time.Millisecond, false}, {100 * time.Millisecond, true}, {800 * time.Millisecond, true}, {1600 * time.Millisecond, true},
		{1999 * time.Millisecond, false}, {time.Millisecond, true}} {
		clk.add(step.wait)
		w := disk.Writes()
		r.Sync()
		if tried := disk.Writes() > w; tried != step.tried {
			t.Fatalf("after %v more: tried %v, want %v", step.wait, tried, step.tried)
		}
	}

	// 16 MiB held, then points are counted as lost, with their times.
	firstLost := -1
	for r.Lost() == 0 {
		put(1)
		if r.Lost() == 1 {
			firstLost = i - 1
		}
	}
	put(999)
	lastLost := i - 1
	r.WriteEvent(pipeline.Event{Kind: "turbo_lag", Start: t0.Add(time.Duration(i) * time.Millisecond)})
	if r.Lost() != 1000 || r.LostEvents() != 1 || r.Unwritten() < DefaultHoldBytes {
		t.Fatalf("lost %d samples, %d events, %d bytes held", r.Lost(), r.LostEvents(), r.Unwritten())
	}

	// Room again: the retry writes everything held, then the gap event.
	disk.SetFree(1 << 30)
	clk.add(maxRetry)
	if err := r.Sync(); err != nil || r.Refusing() {
		t.Fatalf("sync after room came back: %v (refusing %v)", err, r.Refusing())
	}
	gaps := r.TakeResumed()
	if len(gaps) != 1 || gaps[0].Samples != 1000 || gaps[0].Events != 1 ||
		!gaps[0].Start.Equal(t0.Add(time.Duration(firstLost)*time.Millisecond)) || !gaps[0].End.Equal(t0.Add(time.Duration(i)*time.Millisecond)) {
		t.Fatalf("gaps %+v (lost %d to %d)", gaps, firstLost, lastLost)
	}
	put(100)
	if err := r.Close(); !errors.Is(err, ErrDataLost) {
		t.Fatalf("Close of a run that lost data: %v", err)
	}
	samples, nGap, ev := lines(t, disk.Data("0001.lp"), "recording_gap")
	if nGap != 1 || !strings.Contains(ev[0], "lost_samples=1000,") || !strings.Contains(ev[0], "lost_events=1,") {
		t.Fatalf("gap events %q", ev)
	}
	if samples != i-1000 || uint64(samples+nGap) != r.Written() {
		t.Fatalf("%d samples in the file, %d written, %d put, 1000 lost", samples, r.Written(), i)
	}
	var sum Summary
	b, err := os.ReadFile(filepath.Join(dir, "full", "summary.json"))
	if err != nil || json.Unmarshal(b, &sum) != nil {
		t.Fatalf("summary.json: %v %s", err, b)
	}
	if sum.Samples != uint64(samples) || sum.SamplesLost != 1000 || sum.EventsLost != 1 || sum.Gaps != 1 || sum.LagEvents != 0 {
		t.Fatalf("summary %s; %d samples in the file", b, samples)
	}
}

// TestCloseWhileRefused: what the disk still refuses at the close is lost,
// and the summary counts only what reached the disk: its peaks too.
func TestCloseWhileRefused(t *testing.T) {
	dir := t.TempDir()
	disk := recordtest.NewDisk(1 << 20)
	clk := &fakeClock{t: time.Unix(5000, 0)}
	reg := pipeline.NewRegistry()
	boost, _ := reg.Register(pipeline.Channel{Name: "boost_pressure", Quantity: "pressure", Source: "s"})
	r, err := Open(Config{Dir: dir, Run: "cut", Vehicle: "v", Create: createOn(disk), Now: clk.now}, reg)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Unix(1000, 0)
	for i := range 10 {
		r.Write(pipeline.Sample{Channel: boost, Value: float64(i), Time: t0.Add(time.Duration(i) * time.Second)})
	}
	if err := r.Sync(); err != nil {
		t.Fatal(err)
	}
	disk.SetFree(0)
	r.Write(pipeline.Sample{Channel: boost, Value: 90000, Time: t0.Add(20 * time.Second)})
	r.WriteEvent(pipeline.Event{Kind: "warning_raised", Name: "over_boost", Start: t0.Add(20 * time.Second)})
	if err := r.Sync(); !errors.Is(err, syscall.ENOSPC) {
		t.Fatalf("sync on a full disk: %v", err)
	}
	err = r.Close()
	if !errors.Is(err, ErrDataLost) || !errors.Is(err, syscall.ENOSPC) {
		t.Fatalf("Close: %v", err)
	}
	s := r.Summary()
	if s.Samples != 10 || s.SamplesLost != 1 || s.EventsLost != 1 || s.WarningsRaised != 0 || *s.PeakBoostPa != 9 ||
		!s.End.Equal(t0.Add(9*time.Second)) || s.Gaps != 0 {
		t.Fatalf("summary %s", s.JSON())
	}
	if n, _, _ := lines(t, disk.Data("0001.lp"), ""); n != 10 || r.Written() != 10 {
		t.Fatalf("%d lines in the file, %d written", n, r.Written())
	}
	if !exists(filepath.Join(dir, "cut", "ended")) || !exists(filepath.Join(dir, "cut", "summary.json")) {
		t.Fatal("the run was not closed")
	}
}

// TestFsyncRefused: a failing fsync is an outage too; it ends, without a
// gap event, when an fsync works again.
func TestFsyncRefused(t *testing.T) {
	disk := recordtest.NewDisk(1 << 20)
	clk := &fakeClock{t: time.Unix(5000, 0)}
	r, err := Open(Config{Dir: t.TempDir(), Run: "eio", Vehicle: "v", Create: createOn(disk), Now: clk.now}, testRegistry(t))
	if err != nil {
		t.Fatal(err)
	}
	disk.SetSyncErr(syscall.EIO)
	r.Write(pipeline.Sample{Channel: 0, Value: 1, Time: time.Unix(1, 0)})
	if err := r.Sync(); !errors.Is(err, syscall.EIO) || !r.Refusing() {
		t.Fatalf("failing fsync: %v (refusing %v)", err, r.Refusing())
	}
	disk.SetSyncErr(nil)
	clk.add(firstRetry)
	if err := r.Sync(); err != nil || r.Refusing() {
		t.Fatalf("fsync works again: %v (refusing %v)", err, r.Refusing())
	}
	if g := r.TakeResumed(); len(g) != 1 || g[0].Samples != 0 || g[0].Until.Sub(g[0].Since) != firstRetry {
		t.Fatalf("resumed %+v", g)
	}
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	if _, n, _ := lines(t, disk.Data("0001.lp"), "recording_gap"); n != 0 {
		t.Fatal("a gap event without a loss")
	}
}
