package runs

import (
	"context"
	"errors"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/record/recordtest"
)

// feed puts n samples of x through the pipeline and records them, as
// Run's drain does.
func (h *harness) feed(n int, at *time.Time) {
	h.t.Helper()
	for n > 0 {
		k := min(n, 2000)
		for range k {
			*at = at.Add(time.Millisecond)
			h.p.Process(pipeline.Sample{Channel: h.x, Time: *at, Value: 1})
		}
		n -= k
		buf, _ := h.sub.Drain(nil, nil)
		h.c.mu.Lock()
		for _, s := range buf {
			h.c.cur.Write(s)
		}
		h.c.mu.Unlock()
	}
}

func (h *harness) warnings() []pipeline.Event {
	h.mu.Lock()
	defer h.mu.Unlock()
	var w []pipeline.Event
	for _, e := range h.events {
		if e.Name == "recorder_behind" {
			w = append(w, e)
		}
	}
	return w
}

func (h *harness) lastEvent() pipeline.Event {
	h.mu.Lock()
	defer h.mu.Unlock()
	return h.events[len(h.events)-1]
}

func counter(t *testing.T, r pipeline.HealthReport, name string) uint64 {
	t.Helper()
	v, ok := r.Counter(name)
	if !ok {
		t.Fatalf("report %+v lacks %s", r, name)
	}
	return v
}

// countLines counts the sample lines and the recording_gap events in data.
func countLines(t *testing.T, data string) (samples, gaps int) {
	t.Helper()
	if data != "" && !strings.HasSuffix(data, "\n") {
		t.Fatal("the run's file ends in a torn line")
	}
	for _, l := range strings.Split(data, "\n") {
		switch {
		case strings.HasPrefix(l, "plenum,"):
			samples++
		case strings.HasPrefix(l, "plenum_event,kind=recording_gap,"):
			gaps++
		}
	}
	return samples, gaps
}

// TestDiskFullRun: with a disk that fills up mid-run, recorder_behind is
// raised at the first refused write and stays raised (no clear and raise
// again) while samples are being lost; every lost sample is counted, in
// Report and in the subscription's dropped count (the metric
// plenum_consumer_dropped_samples_total); writing resumes when space
// returns, then the warning clears; the run ends with a logged error and a
// summary and run_ended that count what reached the disk and what was
// lost.
func TestDiskFullRun(t *testing.T) {
	disk := recordtest.NewDisk(50_000)
	h := newHarnessSized(t, Config{}, 1<<12)
	h.c.create = func(path string) (record.File, error) { return disk.Create(path) }
	id, err := h.c.Start(StartRequest{})
	if err != nil {
		t.Fatal(err)
	}
	at := time.Unix(3000, 0)
	now := time.Unix(10_000, 0)
	step := func(d time.Duration) { // what Run does at each tick
		now = now.Add(d)
		h.c.sync()
		h.c.watchLoss(now)
	}
	h.feed(100, &at)
	step(time.Second)
	if w := h.warnings(); len(w) != 0 {
		t.Fatalf("warnings with room on the disk: %+v", w)
	}
	h.feed(2000, &at) // ~200 kB: more than the room left
	step(200 * time.Millisecond)
	w := h.warnings()
	if len(w) != 1 || w[0].Kind != "warning_raised" || w[0].Tags["cause"] != "disk_refuses_writes" {
		t.Fatalf("at the first refused write: %+v", w)
	}
	r := h.c.Report()
	if u, _ := r.Gauge("unwritten_bytes"); r.Up || counter(t, r, "write_failures") == 0 || u == 0 || counter(t, r, "lost_samples") != 0 {
		t.Fatalf("report while refused, nothing lost yet: %+v", r)
	}
	// Still refused for 40 s, losing samples past the 16 MiB held (a big disk): the
	// warning stays raised, once.
	for range 40 {
		h.feed(5000, &at)
		step(time.Second)
	}
	r = h.c.Report()
	lost := counter(t, r, "lost_samples")
	if lost == 0 || counter(t, r, "refused_samples") != lost || h.sub.Dropped() != lost {
		t.Fatalf("lost %d, refused %d, the subscription's dropped count %d", lost, counter(t, r, "refused_samples"), h.sub.Dropped())
	}
	if w := h.warnings(); len(w) != 1 {
		t.Fatalf("the warning flickered while samples were being lost: %+v", w)
	}
	// Room again: writing resumes (the harness clock makes each retry due).
	disk.SetFree(1 << 40)
	step(time.Second)
	if h.c.cur.Refusing() {
		t.Fatal("still refusing with room on the disk")
	}
	step(3 * time.Second) // 4 s after the last refusal
	if w := h.warnings(); len(w) != 1 {
		t.Fatalf("cleared before 5 s without loss: %+v", w)
	}
	step(time.Second)
	w = h.warnings()
	if len(w) != 2 || w[1].Kind != "warning_cleared" || w[1].Fields["lost_samples"] != float64(lost) {
		t.Fatalf("after resuming: %+v", w)
	}
	h.feed(100, &at)
	sum, err := h.c.Stop()
	if !errors.Is(err, record.ErrDataLost) {
		t.Fatalf("Stop of a run that lost data: %v", err)
	}
	if logs := h.logs.String(); !strings.Contains(logs, "ERROR the run ended incomplete") {
		t.Fatalf("no error logged at the end:\n%s", logs)
	}
	samples, gaps := countLines(t, string(disk.Data("0001.lp")))
	if gaps != 1 || sum.Samples != uint64(samples) || sum.SamplesLost != lost || sum.Gaps != 1 || sum.Samples+sum.SamplesLost != 2100+40*5000+100 {
		t.Fatalf("summary %s: %d samples and %d gaps in the file, %d lost", sum.JSON(), samples, gaps, lost)
	}
	end := h.lastEvent()
	if end.Kind != "run_ended" || end.Name != id || end.Fields["samples"] != float64(samples) || end.Fields["samples_lost"] != float64(lost) {
		t.Fatalf("run_ended %+v", end)
	}
	if r := h.c.Report(); counter(t, r, "lost_samples") != lost || counter(t, r, "refused_samples") != lost {
		t.Fatalf("report after the run: %+v", r)
	}
}

// TestQueueDropsInTheSummary: samples the recorder's queue dropped during a
// run are part of the run's samples_lost.
func TestQueueDropsInTheSummary(t *testing.T) {
	h := newHarnessSized(t, Config{}, 8)
	t0 := time.Unix(1000, 0)
	for i := range 20 { // dropped before the run: not the run's
		h.p.Process(pipeline.Sample{Channel: h.x, Time: t0.Add(time.Duration(i) * time.Millisecond), Value: 1})
	}
	h.sub.Drain(nil, nil)
	if _, err := h.c.Start(StartRequest{}); err != nil {
		t.Fatal(err)
	}
	for i := range 20 {
		h.p.Process(pipeline.Sample{Channel: h.x, Time: t0.Add(time.Second + time.Duration(i)*time.Millisecond), Value: 1})
	}
	buf, _ := h.sub.Drain(nil, nil)
	for _, s := range buf {
		h.c.cur.Write(s)
	}
	sum, err := h.c.Stop()
	if !errors.Is(err, record.ErrDataLost) || sum.Samples != 8 || sum.SamplesLost != 12 {
		t.Fatalf("summary %s (%v)", sum.JSON(), err)
	}
	if r := h.c.Report(); counter(t, r, "lost_samples") != 24 || counter(t, r, "refused_samples") != 0 {
		t.Fatalf("report %+v", r)
	}
}

// TestHoldBytes: a run holds a quarter of a small disk, 16 MiB of a big
// one, while the disk refuses writes.
func TestHoldBytes(t *testing.T) {
	cases := []struct {
		total uint64
		err   error
		want  int
	}{
		{2 << 20, nil, 512 << 10},
		{1 << 40, nil, record.DefaultHoldBytes},
		{64 << 20, nil, record.DefaultHoldBytes},
		{100 << 10, nil, 64 << 10},
		{0, nil, record.DefaultHoldBytes},
		{1 << 20, errors.New("statfs"), record.DefaultHoldBytes},
	}
	for _, c := range cases {
		if got := holdBytes(c.total, c.err); got != c.want {
			t.Errorf("holdBytes(%d, %v) = %d, want %d", c.total, c.err, got, c.want)
		}
	}
}

// TestFreeSpaceGuard: recorder_behind is raised while the free space of
// the record directory is below MinFreeBytes (default 256 MiB), before the
// disk is full, and cleared once there is room.
func TestFreeSpaceGuard(t *testing.T) {
	cases := []struct {
		name    string
		min     int64
		free    uint64
		raised  bool
		minUsed int64
	}{
		{"default, 100 MiB free", 0, 100 << 20, true, DefaultMinFreeBytes},
		{"default, 1 GiB free", 0, 1 << 30, false, DefaultMinFreeBytes},
		{"50 MiB, 100 MiB free", 50 << 20, 100 << 20, false, 50 << 20},
		{"1 MiB, 1 MiB - 1 free", 1 << 20, 1<<20 - 1, true, 1 << 20},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			h := newHarness(t, Config{MinFreeBytes: c.min})
			h.free = c.free
			if h.c.cfg.MinFreeBytes != c.minUsed {
				t.Fatalf("MinFreeBytes %d, want %d", h.c.cfg.MinFreeBytes, c.minUsed)
			}
			t0 := time.Unix(1000, 0)
			h.c.watchLoss(t0)
			w := h.warnings()
			if raised := len(w) == 1; raised != c.raised {
				t.Fatalf("warnings %+v", w)
			}
			if g, ok := h.c.Report().Gauge("free_bytes"); !ok || g != float64(c.free) {
				t.Fatalf("free_bytes %v %v", g, ok)
			}
			if !c.raised {
				return
			}
			if w[0].Tags["cause"] != "disk_almost_full" || w[0].Fields["free_bytes"] != float64(c.free) {
				t.Fatalf("warning %+v", w[0])
			}
			h.mu.Lock()
			h.free = 1 << 40
			h.mu.Unlock()
			h.c.watchLoss(t0.Add(500 * time.Millisecond)) // looked at once a second
			h.c.watchLoss(t0.Add(5 * time.Second))        // room: 5 s to clear
			if w := h.warnings(); len(w) != 1 {
				t.Fatalf("cleared early: %+v", w)
			}
			h.c.watchLoss(t0.Add(10 * time.Second))
			if w := h.warnings(); len(w) != 2 || w[1].Kind != "warning_cleared" {
				t.Fatalf("not cleared: %+v", w)
			}
		})
	}
}

// TestRunReturnsDataLost: Run ends with an error when the run it closes at
// the end lost samples, so that the daemon does not exit as if all went
// well; a run that kept everything ends without one.
func TestRunReturnsDataLost(t *testing.T) {
	for _, lose := range []bool{false, true} {
		h := newHarnessSized(t, Config{}, 8)
		if _, err := h.c.Start(StartRequest{}); err != nil {
			t.Fatal(err)
		}
		n := 5
		if lose {
			n = 20 // the queue of 8 drops 12 before Run drains it
		}
		for i := range n {
			h.p.Process(pipeline.Sample{Channel: h.x, Time: time.Unix(1000, int64(i)), Value: 1})
		}
		ctx, cancel := context.WithCancel(context.Background())
		cancel()
		err := h.c.Run(ctx)
		if lose != errors.Is(err, record.ErrDataLost) || (!lose && err != nil) {
			t.Errorf("lose %v: Run returned %v", lose, err)
		}
		if lose && !strings.Contains(h.logs.String(), "samples_lost=12") {
			t.Errorf("the loss was not logged:\n%s", h.logs.String())
		}
	}
}
