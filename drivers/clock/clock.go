// Package clock is the one source of time for the drivers: the wall clock in
// production, a manual clock in tests and a precise wall clock for timing
// benchmarks of the virtual bus and the simulated ECU.
package clock

import (
	"runtime"
	"sync"
	"time"
)

// Clock supplies time, so that tests and replays can inject their own.
type Clock interface {
	// Now returns the current time.
	Now() time.Time
	// After returns a channel that receives the time once d has passed.
	After(d time.Duration) <-chan time.Time
}

// System is the wall clock. The zero value is ready to use.
type System struct{}

// Now returns time.Now().
func (System) Now() time.Time { return time.Now() }

// After returns time.After(d).
func (System) After(d time.Duration) <-chan time.Time { return time.After(d) }

// Or returns c, or System{} when c is nil: the default of a Config's Clock.
func Or(c Clock) Clock {
	if c == nil {
		return System{}
	}
	return c
}

// Manual is a clock for tests: time stands still until Advance moves it, and
// an After channel fires only when Advance reaches its deadline. The zero
// value starts at the zero time; it is safe for concurrent use.
type Manual struct {
	mu      sync.Mutex
	now     time.Time
	waiters []manualWaiter
}

type manualWaiter struct {
	at time.Time
	ch chan time.Time
}

// NewManual returns a Manual clock reading start.
func NewManual(start time.Time) *Manual { return &Manual{now: start} }

// Now returns the clock's time.
func (c *Manual) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.now
}

// After returns a channel that receives the clock's time once Advance has
// moved it d or more past the present. A d ≤ 0 fires at once.
func (c *Manual) After(d time.Duration) <-chan time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	ch := make(chan time.Time, 1)
	if d <= 0 {
		ch <- c.now
		return ch
	}
	c.waiters = append(c.waiters, manualWaiter{c.now.Add(d), ch})
	return ch
}

// Pending returns the number of After channels not yet fired.
func (c *Manual) Pending() int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return len(c.waiters)
}

// Advance moves the clock d forward and fires every After channel whose
// deadline it reaches.
func (c *Manual) Advance(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.now = c.now.Add(d)
	kept := c.waiters[:0]
	for _, w := range c.waiters {
		if !w.at.After(c.now) {
			w.ch <- c.now
		} else {
			kept = append(kept, w)
		}
	}
	clear(c.waiters[len(kept):])
	c.waiters = kept
}

// Precise is a wall clock whose After fires within microseconds of the
// deadline. Go's timers can wake up to about a millisecond late when the
// process is idle (measured on the development machine: time.After(250 µs)
// returned after 1.1 ms on average), which swamps the 0.25 ms wire time of a
// CAN frame at 500 kbit/s. Precise sleeps with a timer until Spin before the
// deadline and then yields in a loop until it passes, so it costs CPU: use it
// for benchmarks and timing tests of the virtual bus and the simulated ECU,
// not in production. The zero value is ready to use.
type Precise struct {
	// Spin is how long before the deadline the clock stops sleeping and
	// starts polling (default 1.5 ms).
	Spin time.Duration
}

// Now returns time.Now().
func (Precise) Now() time.Time { return time.Now() }

// After returns a channel that receives the time once d has passed.
func (c Precise) After(d time.Duration) <-chan time.Time {
	ch := make(chan time.Time, 1)
	deadline := time.Now().Add(d)
	spin := c.Spin
	if spin <= 0 {
		spin = 1500 * time.Microsecond
	}
	go func() {
		if coarse := time.Until(deadline) - spin; coarse > 0 {
			time.Sleep(coarse)
		}
		for {
			now := time.Now()
			if !now.Before(deadline) {
				ch <- now
				return
			}
			runtime.Gosched()
		}
	}()
	return ch
}
