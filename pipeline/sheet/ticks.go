package sheet

import (
	"math"
	"strconv"

	gonum "gonum.org/v1/plot"
)

// ticks125 places major ticks at 1, 2 or 5 × 10ⁿ steps, about six across
// the axis, labelled with only the decimals the step needs, and unlabelled
// minor ticks between them.
type ticks125 struct{}

// niceStep returns the 1-2-5 step that cuts span into nearest n parts.
func niceStep(span float64, n int) float64 {
	if span <= 0 || math.IsNaN(span) || math.IsInf(span, 0) {
		return 1
	}
	mag := math.Pow(10, math.Floor(math.Log10(span/float64(n))))
	best, bestErr := mag, math.Inf(1)
	for _, m := range []float64{0.5, 1, 2, 5, 10, 20} {
		step := m * mag
		if e := math.Abs(span/step - float64(n)); e < bestErr {
			best, bestErr = step, e
		}
	}
	return best
}

// Ticks implements gonum's plot.Ticker.
func (ticks125) Ticks(lo, hi float64) []gonum.Tick {
	step := niceStep(hi-lo, 6)
	dec := max(0, -int(math.Floor(math.Log10(step)+1e-9)))
	minor := step / 5
	if m := step / math.Pow(10, math.Floor(math.Log10(step)+1e-9)); math.Abs(m-2) < 1e-6 {
		minor = step / 2
	}
	var out []gonum.Tick
	start := math.Ceil(lo/minor-1e-9) * minor
	for v := start; v <= hi+minor*1e-6; v += minor {
		k := math.Round(v / minor)
		x := k * minor
		t := gonum.Tick{Value: x}
		if r := x / step; math.Abs(r-math.Round(r)) < 1e-6 {
			x = math.Round(r) * step
			t = gonum.Tick{Value: x, Label: strconv.FormatFloat(x+0, 'f', dec, 64)}
			if t.Label == "-0" {
				t.Label = "0"
			}
		}
		out = append(out, t)
		if len(out) > 200 {
			break
		}
	}
	return out
}
