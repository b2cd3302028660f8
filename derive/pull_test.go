package derive

import (
	"testing"
	"time"
)

func TestPullTrigger(t *testing.T) {
	var p PullTrigger
	t0 := time.Unix(0, 0)
	at := func(ms int) time.Time { return t0.Add(time.Duration(ms) * time.Millisecond) }
	steps := []struct {
		ms         int
		thr, rpm   float64
		start, end bool
	}{
		{0, 0.1, 2000, false, false},
		{100, 1.0, 2000, false, false},  // WOT begins
		{400, 1.0, 2300, false, false},  // not held long enough
		{600, 1.0, 2600, true, false},   // held 500 ms, rpm rising: start
		{700, 1.0, 2700, false, false},  // in the pull
		{5000, 0.1, 6500, false, false}, // lift: the close hold begins
		{6000, 0.5, 4000, false, false}, // blip: the hold restarts
		{6500, 0.1, 3500, false, false},
		{8600, 0.1, 2000, false, true}, // closed 2.1 s: end
		{8700, 1.0, 2000, false, false},
		{9300, 1.0, 2000, false, false}, // WOT but rpm not rising (a hold on the brake): no start
	}
	for _, s := range steps {
		start, end := p.Update(at(s.ms), s.thr, s.rpm)
		if start != s.start || end != s.end {
			t.Fatalf("at %d ms: start %v end %v, want %v %v", s.ms, start, end, s.start, s.end)
		}
	}
}
