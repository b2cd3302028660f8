package lag

import (
	"fmt"
	"math"
	"time"
)

// Config sets up a Detector. Zero fields take the defaults given; the
// defaults are common practice, no source.
type Config struct {
	// TipInRate is the throttle opening rate (ratio of full travel per
	// second) that starts a tip-in. Default 2 /s (full travel in 0.5 s).
	TipInRate float64
	// TipInWindow is how long after the rate trigger the throttle may take
	// to reach MinThrottle. Default 300 ms.
	TipInWindow time.Duration
	// MinThrottle is the throttle position (ratio 0–1) a tip-in must reach.
	// Default 0.8.
	MinThrottle float64
	// LiftOff is the throttle position below which a measurement is
	// discarded as a lift-off. Default MinThrottle − 0.1.
	LiftOff float64
	// Target is the boost the response is measured toward, in the unit of
	// the boost input (Pa). Zero means the level boost settles at.
	Target float64
	// Band is the settling band as a fraction of the step. Default
	// DefaultBand (2 %).
	Band float64
	// SettleHold is how long boost must stay within the band for the
	// response to count as settled. Without a Target, "within the band"
	// means the spread of boost over SettleHold is at most Band × the step
	// (±Band/2), a tighter test that keeps the estimated level close to the
	// true one. Default 1 s.
	SettleHold time.Duration
	// MaxDuration ends a measurement that has not settled; it is then
	// discarded. Default 10 s.
	MaxDuration time.Duration
	// MinStep is the smallest boost rise that counts as a response (Pa).
	// Default 10 kPa.
	MinStep float64
	// Capacity is the number of trace points kept per measurement; longer
	// measurements are thinned to every second point. Default 4096.
	Capacity int
}

func (c Config) withDefaults() Config {
	if c.TipInRate == 0 {
		c.TipInRate = 2
	}
	if c.TipInWindow == 0 {
		c.TipInWindow = 300 * time.Millisecond
	}
	if c.MinThrottle == 0 {
		c.MinThrottle = 0.8
	}
	if c.LiftOff == 0 {
		c.LiftOff = c.MinThrottle - 0.1
	}
	if c.Band == 0 {
		c.Band = DefaultBand
	}
	if c.SettleHold == 0 {
		c.SettleHold = time.Second
	}
	if c.MaxDuration == 0 {
		c.MaxDuration = 10 * time.Second
	}
	if c.MinStep == 0 {
		c.MinStep = 10000
	}
	if c.Capacity == 0 {
		c.Capacity = 4096
	}
	return c
}

// Validate checks the configuration after defaults are applied and names the
// first bad field.
func (c Config) Validate() error {
	c = c.withDefaults()
	switch {
	case !(c.TipInRate > 0):
		return fmt.Errorf("lag: tip_in_rate %g must be positive", c.TipInRate)
	case c.TipInWindow < 0:
		return fmt.Errorf("lag: tip_in_window %v is negative", c.TipInWindow)
	case !(c.MinThrottle > 0 && c.MinThrottle <= 1):
		return fmt.Errorf("lag: min_throttle %g outside (0, 1]", c.MinThrottle)
	case !(c.LiftOff >= 0 && c.LiftOff < c.MinThrottle):
		return fmt.Errorf("lag: lift_off %g must lie in [0, min_throttle %g)", c.LiftOff, c.MinThrottle)
	case math.IsNaN(c.Target) || math.IsInf(c.Target, 0):
		return fmt.Errorf("lag: target %g is not finite", c.Target)
	case !(c.Band > 0 && c.Band < 0.5):
		return fmt.Errorf("lag: band %g outside (0, 0.5)", c.Band)
	case c.SettleHold < 0:
		return fmt.Errorf("lag: settle_hold %v is negative", c.SettleHold)
	case c.MaxDuration <= c.SettleHold:
		return fmt.Errorf("lag: max_duration %v must exceed settle_hold %v", c.MaxDuration, c.SettleHold)
	case !(c.MinStep > 0):
		return fmt.Errorf("lag: min_step %g must be positive", c.MinStep)
	case c.Capacity < 16:
		return fmt.Errorf("lag: capacity %d below 16", c.Capacity)
	}
	return nil
}

// Reasons a measurement is discarded.
const (
	ReasonLiftOff  = "throttle lift-off"
	ReasonTimeout  = "boost did not settle within the time limit"
	ReasonNoRise   = "boost did not rise by the minimum step"
	ReasonBadInput = "non-finite input during measurement"
)

// Event is one measured (or discarded) tip-in. Times within it are seconds
// from Start; a level never reached is NaN.
type Event struct {
	Start, End    time.Time // the last sample before the throttle moved; the sample that ended it
	RPM           float64   // engine speed at the tip-in
	Gear          int       // gear at the tip-in (as the caller numbers it)
	Initial       float64   // boost at the tip-in
	Final         float64   // boost the response was measured toward
	FromTarget    bool      // Final is the configured target, not a settled level
	T10, T50, T90 float64   // s
	Rise          float64   // T90 − T10, s
	Overshoot     float64   // ratio of the step
	Settling      float64   // s, 2 % band by default
	Discarded     bool      // the measurement was abandoned; Reason says why
	Reason        string    // why it was discarded
}

type state uint8

const (
	idle state = iota
	armed
	measuring
)

// Detector finds throttle tip-ins in a stream of samples and measures the
// boost response. It keeps one trace buffer allocated at construction and
// does not allocate per sample. A Detector is not safe for concurrent use.
type Detector struct {
	cfg   Config
	st    state
	prevT time.Time
	prev  struct {
		ok              bool
		thr, boost, rpm float64
		gear            int
	}
	ev     Event
	buf    []Point
	stride int
	skip   int
	lastIn float64 // time (s from start) the last point entered the buffer
	// target mode: when the trace entered the band (NaN when outside)
	inBand float64
	// settled-level mode: candidate window
	candT, candMin, candMax float64
}

// NewDetector returns a detector for a configuration (defaults applied).
func NewDetector(cfg Config) (*Detector, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg = cfg.withDefaults()
	return &Detector{cfg: cfg, buf: make([]Point, 0, cfg.Capacity)}, nil
}

// Reset drops any measurement in progress and the previous sample.
func (d *Detector) Reset() {
	d.st = idle
	d.prev.ok = false
	d.buf = d.buf[:0]
}

// Update feeds one sample: time, throttle position (ratio 0–1), boost (Pa,
// gauge or absolute as long as Target uses the same), engine speed (rpm)
// and gear. It returns an event when a measurement ends, completed or
// discarded. Samples whose time does not advance are ignored.
func (d *Detector) Update(t time.Time, throttle, boost, rpm float64, gear int) (Event, bool) {
	if d.prev.ok && !t.After(d.prevT) {
		return Event{}, false
	}
	finite := !(math.IsNaN(throttle) || math.IsInf(throttle, 0) || math.IsNaN(boost) || math.IsInf(boost, 0))
	var out Event
	var done bool
	switch d.st {
	case idle:
		if finite && d.prev.ok {
			rate := (throttle - d.prev.thr) / t.Sub(d.prevT).Seconds()
			if rate >= d.cfg.TipInRate {
				d.begin()
				d.st = armed
				d.record(t, boost)
				if throttle >= d.cfg.MinThrottle {
					d.st = measuring
				}
			}
		}
	case armed, measuring:
		out, done = d.measure(t, throttle, boost, finite)
	}
	if finite {
		d.prevT = t
		d.prev.ok, d.prev.thr, d.prev.boost, d.prev.rpm, d.prev.gear = true, throttle, boost, rpm, gear
	} else if d.st == idle {
		d.prev.ok = false
	}
	return out, done
}

// begin starts a measurement at the previous sample, the last one before
// the throttle moved.
func (d *Detector) begin() {
	d.ev = Event{Start: d.prevT, RPM: d.prev.rpm, Gear: d.prev.gear, Initial: d.prev.boost,
		T10: math.NaN(), T50: math.NaN(), T90: math.NaN(), Rise: math.NaN(), Settling: math.NaN()}
	if d.cfg.Target != 0 {
		d.ev.Final, d.ev.FromTarget = d.cfg.Target, true
	}
	d.buf = d.buf[:0]
	d.stride, d.skip = 1, 0
	d.inBand = math.NaN()
	d.candT, d.candMin, d.candMax = 0, d.prev.boost, d.prev.boost
	d.push(Point{0, d.prev.boost})
}

func (d *Detector) measure(t time.Time, throttle, boost float64, finite bool) (Event, bool) {
	if !finite {
		return d.discard(t, ReasonBadInput)
	}
	el := t.Sub(d.ev.Start).Seconds()
	if d.st == armed {
		switch {
		case throttle >= d.cfg.MinThrottle:
			d.st = measuring
		case el > d.cfg.TipInWindow.Seconds() || throttle < d.prev.thr:
			// Not a tip-in: a partial or hesitant opening. No event.
			d.st = idle
			return Event{}, false
		}
	} else if throttle < d.cfg.LiftOff {
		return d.discard(t, ReasonLiftOff)
	}
	d.record(t, boost)
	hold := d.cfg.SettleHold.Seconds()
	if d.ev.FromTarget {
		step := d.ev.Final - d.ev.Initial
		if step != 0 && math.Abs((boost-d.ev.Initial)/step-1) <= d.cfg.Band {
			if math.IsNaN(d.inBand) {
				d.inBand = el
			}
			if el-d.inBand >= hold && d.st == measuring {
				return d.complete(t, boost)
			}
		} else {
			d.inBand = math.NaN()
		}
	} else {
		tol := d.cfg.Band * math.Abs(boost-d.ev.Initial)
		lo, hi := math.Min(d.candMin, boost), math.Max(d.candMax, boost)
		if hi-lo > tol {
			d.candT, d.candMin, d.candMax = el, boost, boost
		} else {
			d.candMin, d.candMax = lo, hi
			if el-d.candT >= hold && d.st == measuring && math.Abs(boost-d.ev.Initial) >= d.cfg.MinStep {
				d.ev.Final = (lo + hi) / 2
				return d.complete(t, boost)
			}
		}
	}
	if el > d.cfg.MaxDuration.Seconds() {
		if !d.ev.FromTarget && math.Abs(boost-d.ev.Initial) < d.cfg.MinStep {
			return d.discard(t, ReasonNoRise)
		}
		return d.discard(t, ReasonTimeout)
	}
	return Event{}, false
}

// record adds a sample to the trace, thinning when the buffer is full.
func (d *Detector) record(t time.Time, v float64) {
	el := t.Sub(d.ev.Start).Seconds()
	d.skip++
	if d.skip < d.stride {
		return
	}
	d.skip = 0
	d.push(Point{el, v})
}

func (d *Detector) push(p Point) {
	if len(d.buf) == cap(d.buf) {
		n := 0
		for i := 0; i < len(d.buf); i += 2 {
			d.buf[n] = d.buf[i]
			n++
		}
		d.buf = d.buf[:n]
		d.stride *= 2
	}
	d.buf = append(d.buf, p)
	d.lastIn = p.T
}

func (d *Detector) complete(t time.Time, v float64) (Event, bool) {
	if el := t.Sub(d.ev.Start).Seconds(); el > d.lastIn {
		d.push(Point{el, v})
	}
	ev := d.ev
	ev.End = t
	m, err := Analyze(d.buf, ev.Initial, ev.Final, d.cfg.Band)
	d.st = idle
	if err != nil {
		ev.Discarded, ev.Reason = true, ReasonNoRise
		return ev, true
	}
	ev.T10, ev.T50, ev.T90, ev.Rise = m.T10, m.T50, m.T90, m.Rise
	ev.Overshoot, ev.Settling = m.Overshoot, m.Settling
	return ev, true
}

func (d *Detector) discard(t time.Time, reason string) (Event, bool) {
	ev := d.ev
	ev.End, ev.Discarded, ev.Reason = t, true, reason
	d.st = idle
	return ev, true
}
