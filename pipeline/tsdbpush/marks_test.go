package tsdbpush

import (
	"net/http"
	"sync"
	"testing"
)

// told collects what OnPushed is told.
type told struct {
	mu   sync.Mutex
	runs map[string]bool // name → complete
	fail bool            // OnPushed refuses (the marker cannot be written)
}

func (o *told) onPushed(name string, complete bool) error {
	o.mu.Lock()
	defer o.mu.Unlock()
	if o.fail {
		return errTest
	}
	if o.runs == nil {
		o.runs = map[string]bool{}
	}
	o.runs[name] = complete
	return nil
}

func (o *told) get(name string) (complete, ok bool) {
	o.mu.Lock()
	defer o.mu.Unlock()
	complete, ok = o.runs[name]
	return complete, ok
}

type testErr string

func (e testErr) Error() string { return string(e) }

const errTest = testErr("refused by the test")

// TestMarksToldOnceAcknowledged: a run is told pushed only once the server
// has acknowledged every line appended before its mark; the mark survives
// a restart while the server refuses; lines dropped unsent make it
// incomplete.
func TestMarksToldOnceAcknowledged(t *testing.T) {
	down := func(int, []byte, http.ResponseWriter) int { return 503 }
	s := newSink(t, down)
	cfg := testConfig(t, s.url())
	var o told
	cfg.OnPushed = o.onPushed
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	appendAll(t, p, genLines(300, 1e18), 50)
	p.Mark("run-a")
	appendAll(t, p, genLines(200, 2e18), 50)
	p.Mark("run-b")
	stop := running(t, p)
	waitFor(t, "retries", func() bool { return p.Stats().Retries >= 3 })
	stop()
	if _, ok := o.get("run-a"); ok {
		t.Fatal("run-a told pushed while the server refused every line")
	}
	if err := p.Close(); err != nil {
		t.Fatal(err)
	}

	// A restart: the server takes lines again; the marks were kept.
	s.setAnswer(nil)
	p, err = Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	stop = running(t, p)
	waitFor(t, "both runs told", func() bool {
		_, a := o.get("run-a")
		_, b := o.get("run-b")
		return a && b
	})
	stop()
	if got := len(s.got()); got != 500 {
		t.Fatalf("the server has %d lines, want 500", got)
	}
	for _, r := range []string{"run-a", "run-b"} {
		if c, _ := o.get(r); !c {
			t.Errorf("%s told incomplete; nothing was dropped", r)
		}
	}
}

func TestMarkIncompleteWhenStagingDrops(t *testing.T) {
	s := newSink(t, nil)
	cfg := testConfig(t, s.url())
	cfg.MaxBacklogBytes = 8 << 10 // staging holds at most this
	var o told
	cfg.OnPushed = o.onPushed
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	appendAll(t, p, genLines(200, 1e18), 1) // Run not running: staging fills
	if p.Stats().DroppedLines == 0 {
		t.Fatal("the test wants dropped lines")
	}
	p.Mark("lossy")
	stop := running(t, p)
	waitFor(t, "lossy told", func() bool { _, ok := o.get("lossy"); return ok })
	appendAll(t, p, genLines(20, 3e18), 5)
	p.Mark("whole")
	waitFor(t, "whole told", func() bool { _, ok := o.get("whole"); return ok })
	stop()
	if c, _ := o.get("lossy"); c {
		t.Error("a run whose lines were dropped unsent was told complete")
	}
	if c, _ := o.get("whole"); !c {
		t.Error("the next run, nothing dropped, was told incomplete")
	}
}

// TestMarkKeptWhileOnPushedFails: a marker that cannot be written is
// tried again.
func TestMarkKeptWhileOnPushedFails(t *testing.T) {
	s := newSink(t, nil)
	cfg := testConfig(t, s.url())
	o := told{fail: true}
	cfg.OnPushed = o.onPushed
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	appendAll(t, p, genLines(10, 1e18), 5)
	p.Mark("r")
	stop := running(t, p)
	waitFor(t, "sent", func() bool { return p.Stats().SentLines == 10 })
	o.mu.Lock()
	o.fail = false
	o.mu.Unlock()
	waitFor(t, "told after the failure", func() bool { _, ok := o.get("r"); return ok })
	stop()
}

// TestMarkCoversWhatAnEarlierProcessLeft: a mark made before anything is
// appended after Open (a run cut short, found at the start) is told once
// the lines the earlier process left in the backlog are acknowledged.
func TestMarkCoversWhatAnEarlierProcessLeft(t *testing.T) {
	s := newSink(t, func(int, []byte, http.ResponseWriter) int { return 503 })
	cfg := testConfig(t, s.url())
	var o told
	cfg.OnPushed = o.onPushed
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	appendAll(t, p, genLines(100, 1e18), 10)
	if err := p.Close(); err != nil { // a cut: no mark was made
		t.Fatal(err)
	}
	p, err = Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	p.Mark("cut-short")
	stop := running(t, p)
	waitFor(t, "retries", func() bool { return p.Stats().Retries >= 2 })
	if _, ok := o.get("cut-short"); ok {
		t.Fatal("told before the server took the lines")
	}
	s.setAnswer(nil)
	waitFor(t, "told", func() bool { _, ok := o.get("cut-short"); return ok })
	stop()
	if len(s.got()) != 100 {
		t.Fatalf("server has %d lines", len(s.got()))
	}
}

// TestMarkIncompleteWhenTheBoundDrops: while the server is away the
// backlog's bound removes the oldest unsent segments; the runs whose lines
// were in them are told incomplete, a later run complete.
func TestMarkIncompleteWhenTheBoundDrops(t *testing.T) {
	s := newSink(t, func(int, []byte, http.ResponseWriter) int { return 503 })
	cfg := testConfig(t, s.url())
	cfg.MaxBacklogBytes = 16 << 10
	cfg.SegmentBytes = 4 << 10
	var o told
	cfg.OnPushed = o.onPushed
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	stop := running(t, p)
	feed := func(lines []string) {
		for i := 0; i < len(lines); i += 10 {
			appendAll(t, p, lines[i:min(i+10, len(lines))], 10)
			waitFor(t, "staged lines written", func() bool { return p.stage.size() == 0 })
		}
	}
	feed(genLines(100, 1e18)) // about 11 KB: within the bound
	p.Mark("early")
	feed(genLines(300, 2e18)) // 33 KB more: the oldest segments go
	p.Mark("middle")
	waitFor(t, "segments dropped", func() bool { return p.Stats().DroppedSegments > 0 })
	s.setAnswer(nil)
	waitFor(t, "both told", func() bool {
		_, a := o.get("early")
		_, b := o.get("middle")
		return a && b
	})
	feed(genLines(10, 3e18))
	p.Mark("late")
	waitFor(t, "late told", func() bool { _, ok := o.get("late"); return ok })
	stop()
	if c, _ := o.get("early"); c {
		t.Error("early: its lines were dropped by the bound, told complete")
	}
	if c, _ := o.get("middle"); c {
		t.Error("middle: lines of it were dropped by the bound, told complete")
	}
	if c, _ := o.get("late"); !c {
		t.Error("late: nothing dropped, told incomplete")
	}
}
