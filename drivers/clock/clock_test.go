package clock

import (
	"testing"
	"time"
)

var (
	_ Clock = System{}
	_ Clock = (*Manual)(nil)
	_ Clock = Precise{}
)

func TestPrecise(t *testing.T) {
	var c Precise
	for _, d := range []time.Duration{0, 200 * time.Microsecond, 3 * time.Millisecond} {
		start := time.Now()
		at := <-c.After(d)
		if at.Sub(start) < d {
			t.Errorf("After(%v) fired after %v", d, at.Sub(start))
		}
	}
}

func TestSystem(t *testing.T) {
	var c System
	start := time.Now()
	at := <-c.After(time.Millisecond)
	if at.Sub(start) < time.Millisecond {
		t.Errorf("After(1ms) fired after %v", at.Sub(start))
	}
	if n := c.Now(); n.Before(start) {
		t.Errorf("Now %v before %v", n, start)
	}
}

func TestOr(t *testing.T) {
	if _, ok := Or(nil).(System); !ok {
		t.Errorf("Or(nil) = %T, want System", Or(nil))
	}
	m := &Manual{}
	if Or(m) != Clock(m) {
		t.Error("Or(m) did not return m")
	}
}

func fired(ch <-chan time.Time) (time.Time, bool) {
	select {
	case t := <-ch:
		return t, true
	default:
		return time.Time{}, false
	}
}

func TestManual(t *testing.T) {
	start := time.Unix(1000, 0)
	c := NewManual(start)
	if got := c.Now(); !got.Equal(start) {
		t.Fatalf("Now = %v, want %v", got, start)
	}
	if _, ok := fired(c.After(0)); !ok {
		t.Error("After(0) did not fire at once")
	}
	a, b := c.After(10*time.Millisecond), c.After(20*time.Millisecond)
	if c.Pending() != 2 {
		t.Fatalf("Pending = %d, want 2", c.Pending())
	}
	for _, step := range []struct {
		adv          time.Duration
		aFire, bFire bool
		pending      int
	}{
		{9 * time.Millisecond, false, false, 2},
		{time.Millisecond, true, false, 1}, // exactly at a's deadline
		{15 * time.Millisecond, false, true, 0},
	} {
		c.Advance(step.adv)
		if at, ok := fired(a); ok != step.aFire {
			t.Errorf("after +%v: a fired %v, want %v", step.adv, ok, step.aFire)
		} else if ok && !at.Equal(c.Now()) {
			t.Errorf("a fired with %v, want %v", at, c.Now())
		}
		if _, ok := fired(b); ok != step.bFire {
			t.Errorf("after +%v: b fired %v, want %v", step.adv, ok, step.bFire)
		}
		if c.Pending() != step.pending {
			t.Errorf("after +%v: Pending = %d, want %d", step.adv, c.Pending(), step.pending)
		}
	}
	if got, want := c.Now(), start.Add(25*time.Millisecond); !got.Equal(want) {
		t.Errorf("Now = %v, want %v", got, want)
	}
	var z Manual // the zero value works
	ch := z.After(time.Second)
	z.Advance(time.Second)
	if _, ok := fired(ch); !ok {
		t.Error("zero Manual: After did not fire")
	}
}
