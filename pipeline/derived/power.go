package derived

import (
	"math"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// power computes observed and corrected power from a dyno torque channel.
type power struct {
	std derive.Standard
	amb derive.Ambient // used where ambient channels are missing
	// entered, when set, are conditions entered for the run: a field that
	// is not NaN wins over the ambient channel. Set from another goroutine.
	entered atomic.Pointer[derive.Ambient]
}

// Name names the derivation.
func (d *power) Name() string { return "power" }

// Inputs are dyno torque, engine speed and, optionally, the ambient
// conditions and fuel mass flow.
func (d *power) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "dyno_torque"}, {Name: "engine_speed"}, {Name: "baro_pressure", Optional: true},
		{Name: "ambient_temp", Optional: true}, {Name: "ambient_humidity", Optional: true}, {Name: "fuel_mass_flow", Optional: true}}
}

// Outputs are observed and corrected power, the correction factor and BSFC.
func (d *power) Outputs() []pipeline.Channel {
	out := pipeline.DerivedOutputs("brake_power", "corrected_power", "correction_factor", "bsfc")
	// The sensor labels name the standard in use, so that series corrected
	// to different standards never mix.
	out[1].Sensor = "corrected_" + d.std.String()
	out[2].Sensor = d.std.String()
	return out
}

// Derive computes power, corrects it for the ambient conditions (entered
// for the run, else measured where there are channels, else the defaults)
// and computes BSFC above 1 kW.
func (d *power) Derive(_ time.Time, in, out []float64) uint64 {
	a := d.amb
	if !math.IsNaN(in[2]) {
		a.Pressure = in[2]
	}
	if !math.IsNaN(in[3]) {
		a.Temperature = in[3]
	}
	if !math.IsNaN(in[4]) {
		a.Humidity = in[4]
	}
	if e := d.entered.Load(); e != nil {
		if !math.IsNaN(e.Pressure) {
			a.Pressure = e.Pressure
		}
		if !math.IsNaN(e.Temperature) {
			a.Temperature = e.Temperature
		}
		if !math.IsNaN(e.Humidity) {
			a.Humidity = e.Humidity
		}
	}
	p := derive.PowerFromTorque(in[0], in[1])
	out[0] = p
	cf, err := d.std.Factor(a)
	if err != nil {
		return 1
	}
	out[1] = p * cf
	out[2] = cf
	mask := uint64(0b111)
	if !math.IsNaN(in[5]) && p > 1000 {
		out[3] = derive.BSFC(in[5]/1000, p) * 1000 // g/J, the Prometheus base units
		mask |= 0b1000
	}
	return mask
}
