package console

import (
	"math"
	"strconv"

	"github.com/plenum-engine/plenum/pipeline"
)

// Canonical is the placeholder Formatter until the display-units layer is
// plugged in: the canonical value rounded to about four significant
// figures (no float noise), with the canonical unit's symbol.
type Canonical struct{}

var symbols = map[pipeline.Unit]string{
	pipeline.Pascal:          "Pa",
	pipeline.Celsius:         "°C",
	pipeline.KilogramsPerSec: "kg/s",
	pipeline.GramsPerSec:     "g/s",
	pipeline.Seconds:         "s",
	pipeline.Ratio:           "",
	pipeline.Volts:           "V",
	pipeline.Amperes:         "A",
	pipeline.RPM:             "rpm",
	pipeline.MetresPerSecond: "m/s",
	pipeline.Watts:           "W",
	pipeline.NewtonMetres:    "N·m",
	pipeline.Degrees:         "°",
	pipeline.CubicMetresPerS: "m³/s",
	pipeline.GramsPerJoule:   "g/J",
	pipeline.Count:           "",
	pipeline.None:            "",
}

// Format rounds v and names the canonical unit.
func (Canonical) Format(ch pipeline.Channel, v float64) (text, unit string) {
	unit, ok := symbols[ch.Unit]
	if !ok {
		unit = string(ch.Unit)
	}
	return Round(v), unit
}

// Round gives v with about four significant figures in plain decimal
// notation, without exponent or float noise; "–" for NaN and ±Inf.
func Round(v float64) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "–"
	}
	a := math.Abs(v)
	dec := 0
	switch {
	case a == 0 || a >= 1000:
		dec = 0
	case a >= 100:
		dec = 1
	case a >= 10:
		dec = 2
	case a >= 1:
		dec = 3
	default:
		// small values: four significant figures after the leading zeros.
		dec = min(3-int(math.Floor(math.Log10(a))), 12)
	}
	s := strconv.FormatFloat(v, 'f', dec, 64)
	if s == "-0" {
		s = "0"
	}
	return s
}
