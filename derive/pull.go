package derive

import "time"

// PullTrigger recognises a dyno pull: wide-open throttle with engine speed
// rising starts it; the throttle closing ends it. Thresholds are common
// practice, no source. Not safe for concurrent use.
type PullTrigger struct {
	OpenThrottle  float64       // ratio; default 0.9
	CloseThrottle float64       // ratio; default 0.2
	Hold          time.Duration // how long the start condition must hold; default 500 ms
	CloseHold     time.Duration // how long the throttle must stay closed; default 2 s

	inPull     bool
	since      time.Time
	closedAt   time.Time
	startRPM   float64
	haveSample bool
}

func (p *PullTrigger) defaults() {
	if p.OpenThrottle == 0 {
		p.OpenThrottle = 0.9
	}
	if p.CloseThrottle == 0 {
		p.CloseThrottle = 0.2
	}
	if p.Hold == 0 {
		p.Hold = 500 * time.Millisecond
	}
	if p.CloseHold == 0 {
		p.CloseHold = 2 * time.Second
	}
}

// Update feeds the latest throttle (ratio) and engine speed (rpm) at t and
// reports whether a pull starts or ends with this sample.
func (p *PullTrigger) Update(t time.Time, throttle, rpm float64) (start, end bool) {
	p.defaults()
	if !p.inPull {
		if throttle < p.OpenThrottle {
			p.since = time.Time{}
			return false, false
		}
		if p.since.IsZero() {
			p.since, p.startRPM = t, rpm
			return false, false
		}
		if t.Sub(p.since) >= p.Hold && rpm > p.startRPM+100 {
			p.inPull, p.closedAt = true, time.Time{}
			return true, false
		}
		return false, false
	}
	if throttle > p.CloseThrottle {
		p.closedAt = time.Time{}
		return false, false
	}
	if p.closedAt.IsZero() {
		p.closedAt = t
	}
	if t.Sub(p.closedAt) >= p.CloseHold {
		p.inPull, p.since = false, time.Time{}
		return false, true
	}
	return false, false
}

// InPull reports whether a pull is under way.
func (p *PullTrigger) InPull() bool { return p.inPull }
