package plot

import (
	"strings"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
)

// CatalogueUnit names a channel's canonical unit for an axis label ("" when it
// has none or is unknown).
func CatalogueUnit(ch string) string {
	if c, ok := pipeline.Catalogued(ch); ok && c.Unit != pipeline.None {
		return strings.ReplaceAll(string(c.Unit), "_", " ")
	}
	return ""
}

// DisplayScale shows a catalogued channel on a plot axis as the display layer
// shows it to a person: its unit symbol and conversion; a channel the
// catalogue lacks is left to CatalogueUnit. Pressures are drawn as measured
// (an axis has no barometric pressure to shift by) and labelled with the
// symbol alone, so that the default boost axis stays "boost (kPa)".
func DisplayScale(f display.Formatter) func(string) (Scale, bool) {
	return func(ch string) (Scale, bool) {
		c, ok := pipeline.Catalogued(ch)
		if !ok {
			return Scale{}, false
		}
		s := f.ScaleOf(c)
		return Scale{Unit: s.Unit, Factor: s.Factor, Offset: s.Offset}, true
	}
}
