package derived

import (
	"math"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// chargeAir computes compressor efficiency, corrected compressor flow and
// intercooler effectiveness from the charge-air sensors that exist.
type chargeAir struct {
	ref        derive.FlowReference
	baro       float64
	filterDrop float64
}

// Name names the derivation.
func (d *chargeAir) Name() string { return "charge_air" }

// Inputs are compressor outlet pressure, charge temperature before the
// cooler, ambient temperature and, optionally, inlet and barometric
// pressure, intake air temperature and air mass flow.
func (d *chargeAir) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "compressor_outlet_pressure"}, {Name: "charge_temp_pre_cooler"}, {Name: "ambient_temp"},
		{Name: "compressor_inlet_pressure", Optional: true}, {Name: "baro_pressure", Optional: true},
		{Name: "intake_air_temp", Optional: true}, {Name: "air_mass_flow", Optional: true}}
}

// Outputs are compressor efficiency, corrected compressor flow and
// intercooler effectiveness.
func (d *chargeAir) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("compressor_efficiency", "corrected_compressor_flow", "intercooler_effectiveness")
}

// Derive computes each output its inputs allow.
func (d *chargeAir) Derive(_ time.Time, in, out []float64) uint64 {
	baro := in[4]
	if math.IsNaN(baro) {
		baro = d.baro
	}
	p1 := derive.CompressorInletPressure(in[3], !math.IsNaN(in[3]), baro, d.filterDrop)
	pr := derive.PressureRatio(in[0], p1)
	var mask uint64
	// Efficiency means something only with a real pressure rise.
	if pr > 1.15 && in[1]-in[2] > 5 {
		out[0] = derive.CompressorEfficiency(in[2], in[1], pr)
		mask |= 1
	}
	if !math.IsNaN(in[6]) {
		out[1] = d.ref.CorrectedMassFlow(in[6], p1, in[2])
		mask |= 2
	}
	if !math.IsNaN(in[5]) && in[1]-in[2] > 5 {
		out[2] = derive.IntercoolerEffectiveness(in[1], in[5], in[2])
		mask |= 4
	}
	return mask
}
