// Package lag measures step responses: offline metrics over a sampled trace
// (10/50/90 % times, rise time, overshoot, 2 % settling time) and an online
// turbo-lag detector that watches throttle tip-ins and measures how boost
// follows. It is pure code: time comes in with the samples.
package lag

import (
	"errors"
	"fmt"
	"math"
)

// Point is one sample of a trace: time in seconds and a value.
type Point struct {
	T float64 // s
	V float64 // value, in the signal's unit
}

// Metrics are the step-response figures of a trace moving from an initial
// value toward a final (target) value. Times are seconds from the first
// point of the trace; a crossing that never happened is NaN.
type Metrics struct {
	T10, T50, T90 float64 // first time the response reached 10, 50, 90 % of the step
	Rise          float64 // T90 − T10 (Dorf & Bishop 10–90 % rise time)
	Peak          float64 // the value furthest in the step's direction
	PeakTime      float64 // when it occurred
	Overshoot     float64 // (peak − final)/(final − initial), ratio, 0 if none
	Settling      float64 // time of the last entry into the band that the trace stays in
	Settled       bool    // the trace ends inside the band
}

// DefaultBand is the settling band: ±2 % of the step (Ogata §5-3, Dorf &
// Bishop: first entry into and stay within ±2 % of the final value). The
// band is taken as a fraction of the step size |final − initial| so that a
// step from a non-zero level (boost from atmospheric) is treated like a
// step from zero.
const DefaultBand = 0.02

// ErrNoStep is returned when the initial and final values are equal.
var ErrNoStep = errors.New("lag: initial and final values are equal")

// Analyze computes step-response metrics of trace toward final from
// initial with a settling band (fraction of the step; ≤ 0 means
// DefaultBand). Crossing times are linearly interpolated between samples.
// The trace must have increasing times. Analyze does not allocate.
func Analyze(trace []Point, initial, final, band float64) (Metrics, error) {
	m := Metrics{T10: math.NaN(), T50: math.NaN(), T90: math.NaN(), Rise: math.NaN(), Settling: math.NaN(), PeakTime: math.NaN(), Peak: math.NaN()}
	if len(trace) < 2 {
		return m, fmt.Errorf("lag: trace has %d points, need at least 2", len(trace))
	}
	step := final - initial
	if step == 0 || math.IsNaN(step) || math.IsInf(step, 0) {
		return m, ErrNoStep
	}
	if !(band > 0) {
		band = DefaultBand
	}
	for i := 1; i < len(trace); i++ {
		if !(trace[i].T > trace[i-1].T) {
			return m, fmt.Errorf("lag: trace time does not increase at point %d (%g s after %g s)", i, trace[i].T, trace[i-1].T)
		}
	}
	t0 := trace[0].T
	// frac is the progress of a value toward the final value, 0 at the
	// initial value and 1 at the final one, whatever the step's sign.
	frac := func(v float64) float64 { return (v - initial) / step }
	peak := math.Inf(-1)
	lastOut := -1 // index of the last point outside the band
	for i, p := range trace {
		f := frac(p.V)
		if f > peak {
			peak, m.Peak, m.PeakTime = f, p.V, p.T-t0
		}
		if math.Abs(f-1) > band {
			lastOut = i
		}
	}
	m.T10 = crossing(trace, frac, 0.1)
	m.T50 = crossing(trace, frac, 0.5)
	m.T90 = crossing(trace, frac, 0.9)
	m.Rise = m.T90 - m.T10
	if peak > 1 {
		m.Overshoot = peak - 1
	}
	switch {
	case lastOut == -1:
		m.Settled, m.Settling = true, 0
	case lastOut < len(trace)-1:
		m.Settled = true
		a, b := trace[lastOut], trace[lastOut+1]
		fa, fb := frac(a.V), frac(b.V)
		edge := 1 + band
		if fa < 1 {
			edge = 1 - band
		}
		m.Settling = interp(a.T, fa, b.T, fb, edge) - t0
	}
	return m, nil
}

// crossing returns the first time (from trace start) that the progress
// reaches level, interpolated, or NaN.
func crossing(trace []Point, frac func(float64) float64, level float64) float64 {
	prev := frac(trace[0].V)
	if prev >= level {
		return 0
	}
	for i := 1; i < len(trace); i++ {
		f := frac(trace[i].V)
		if f >= level {
			return interp(trace[i-1].T, prev, trace[i].T, f, level) - trace[0].T
		}
		prev = f
	}
	return math.NaN()
}

// interp returns the time at which the line through (ta, fa), (tb, fb)
// reaches f.
func interp(ta, fa, tb, fb, f float64) float64 {
	if fb == fa {
		return tb
	}
	return ta + (tb-ta)*(f-fa)/(fb-fa)
}
