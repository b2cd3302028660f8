package derived

import (
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// The mixture and fuel family: λ and AFR from a wideband, fuel flow, and λ
// error against the ECU's command.

// mixture turns the wideband controller's voltage into λ and AFR.
type mixture struct {
	wb     derive.Wideband
	stoich float64
}

// Name names the derivation.
func (d *mixture) Name() string { return "mixture" }

// Inputs is the wideband controller's voltage.
func (d *mixture) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "wideband_voltage"}}
}

// Outputs are λ and AFR.
func (d *mixture) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("lambda", "air_fuel_ratio")
}

// Derive computes λ, then AFR for the fuel.
func (d *mixture) Derive(_ time.Time, in, out []float64) uint64 {
	out[0] = d.wb.Lambda(in[0])
	out[1] = derive.AFR(out[0], d.stoich)
	return 0b11
}

// fuelFlow computes fuel mass flow (g/s) and volume flow (m³/s) from air
// mass flow (g/s) and λ.
type fuelFlow struct{ fuel derive.Fuel }

// Name names the derivation.
func (d *fuelFlow) Name() string { return "fuel_flow" }

// Inputs are air mass flow and λ.
func (d *fuelFlow) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "air_mass_flow"}, {Name: "lambda"}}
}

// Outputs are fuel mass and volume flow.
func (d *fuelFlow) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("fuel_mass_flow", "fuel_volume_flow")
}

// Derive computes fuel mass flow (g/s) and volume flow (m³/s).
func (d *fuelFlow) Derive(_ time.Time, in, out []float64) uint64 {
	out[0] = derive.FuelMassFlow(in[0], in[1], d.fuel.Stoich) // g/s in, g/s out
	out[1] = derive.FuelVolumeFlow(out[0]/1000, d.fuel.Density)
	return 0b11
}

// lambdaError is measured λ less the λ the ECU commands, when the ECU's
// commanded equivalence ratio (PID 0x44) is polled.
type lambdaError struct{}

// Name names the derivation.
func (lambdaError) Name() string { return "lambda_error" }

// Inputs are measured and commanded λ.
func (lambdaError) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "lambda"}, {Name: "ecu_commanded_lambda"}}
}

// Outputs is the λ error.
func (lambdaError) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("lambda_error")
}

// Derive computes measured less commanded λ.
func (lambdaError) Derive(_ time.Time, in, out []float64) uint64 {
	out[0] = in[0] - in[1]
	return 1
}
