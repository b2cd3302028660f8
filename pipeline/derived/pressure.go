package derived

import (
	"math"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// The boost and pressure ratio family.

// boost computes manifold gauge pressure and the compressor pressure ratio,
// from a barometric channel when fresh, else from the configured pressure.
type boost struct{ baro float64 }

// Name names the derivation.
func (d *boost) Name() string { return "boost" }

// Inputs are MAP and, optionally, barometric pressure.
func (d *boost) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "manifold_pressure"}, {Name: "baro_pressure", Optional: true}}
}

// Outputs are boost and the manifold pressure ratio.
func (d *boost) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("boost_pressure", "manifold_pressure_ratio")
}

// Derive computes boost and the ratio against the barometric channel or the
// configured pressure.
func (d *boost) Derive(_ time.Time, in, out []float64) uint64 {
	baro := in[1]
	if math.IsNaN(baro) {
		baro = d.baro
	}
	out[0] = derive.Boost(in[0], baro)
	out[1] = derive.PressureRatio(in[0], baro)
	return 0b11
}

// compressorRatio is the compressor's outlet over inlet pressure, when an
// outlet sensor exists; the inlet is a pre-compressor sensor or barometric.
type compressorRatio struct{ baro float64 }

// Name names the derivation.
func (d *compressorRatio) Name() string { return "compressor_ratio" }

// Inputs are the outlet pressure and, optionally, inlet and barometric pressure.
func (d *compressorRatio) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "compressor_outlet_pressure"}, {Name: "compressor_inlet_pressure", Optional: true}, {Name: "baro_pressure", Optional: true}}
}

// Outputs is the compressor pressure ratio.
func (d *compressorRatio) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("compressor_pressure_ratio")
}

// Derive computes the ratio against the first inlet pressure there is.
func (d *compressorRatio) Derive(_ time.Time, in, out []float64) uint64 {
	inlet := in[1]
	if math.IsNaN(inlet) {
		inlet = in[2]
	}
	if math.IsNaN(inlet) {
		inlet = d.baro
	}
	out[0] = derive.PressureRatio(in[0], inlet)
	return 1
}
