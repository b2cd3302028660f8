package console

import (
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
)

// People is the Formatter of the display-units layer: values in the units
// the configuration chose, rounded per quantity.
type People struct{ display.Formatter }

// Format gives v's number and unit symbol as a person reads them.
func (p People) Format(ch pipeline.Channel, v float64) (text, unit string) {
	x := p.Formatter.Format(ch, v)
	return x.Text(), x.Unit
}
