package sheet

import "math"

// XY is one point of a trace: x is engine speed (rpm) or seconds since
// tip-in, y a value in its channel's canonical unit.
type XY struct{ X, Y float64 }

// Peak is the highest point of a trace.
type Peak struct {
	X, Y float64
	OK   bool // false for an empty trace
}

// Bin averages samples against engine speed into bins width rpm wide,
// centred on whole multiples of width: one point per bin that holds a
// sample, at the bin's centre, in ascending order. The bins are what the
// moving average counts its window in.
func Bin(samples []XY, width float64) []XY {
	if width <= 0 || len(samples) == 0 {
		return nil
	}
	type acc struct {
		sum float64
		n   int
	}
	bins := map[int64]*acc{}
	lo, hi := int64(math.MaxInt64), int64(math.MinInt64)
	for _, s := range samples {
		if math.IsNaN(s.X) || math.IsNaN(s.Y) || math.IsInf(s.Y, 0) {
			continue
		}
		k := int64(math.Floor(s.X/width + 0.5))
		a := bins[k]
		if a == nil {
			a = &acc{}
			bins[k] = a
		}
		a.sum += s.Y
		a.n++
		lo, hi = min(lo, k), max(hi, k)
	}
	var out []XY
	for k := lo; k <= hi && len(bins) > 0; k++ {
		if a := bins[k]; a != nil {
			out = append(out, XY{float64(k) * width, a.sum / float64(a.n)})
		}
	}
	return out
}

// Smooth returns the centred moving average of ys over window points
// (window is made odd: an even window grows by one). Near either end the
// window shrinks symmetrically, so every average stays centred on its own
// point and the ends are not pulled towards the middle. This is the simple
// (equally weighted) moving average of the NIST/SEMATECH e-Handbook of
// Statistical Methods, section 6.4.2 "What are Moving Average or Smoothing
// Techniques?" (cited from memory), taken centred as for smoothing rather
// than trailing as for forecasting.
func Smooth(ys []float64, window int) []float64 {
	half := max(window, 1) / 2
	out := make([]float64, len(ys))
	for i := range ys {
		h := min(half, i, len(ys)-1-i)
		var sum float64
		for j := i - h; j <= i+h; j++ {
			sum += ys[j]
		}
		out[i] = sum / float64(2*h+1)
	}
	return out
}

// Smoothed bins samples (Bin) and smooths the bins (Smooth): the trace the
// sheet draws and reads its peaks from.
func Smoothed(samples []XY, binWidth float64, window int) []XY {
	b := Bin(samples, binWidth)
	ys := make([]float64, len(b))
	for i, p := range b {
		ys[i] = p.Y
	}
	for i, y := range Smooth(ys, window) {
		b[i].Y = y
	}
	return b
}

// PeakOf returns the highest point of a trace (the first of equals).
func PeakOf(trace []XY) Peak {
	var p Peak
	for _, v := range trace {
		if math.IsNaN(v.Y) {
			continue
		}
		if !p.OK || v.Y > p.Y {
			p = Peak{X: v.X, Y: v.Y, OK: true}
		}
	}
	return p
}
