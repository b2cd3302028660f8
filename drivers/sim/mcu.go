package sim

import (
	"math"
)

// Sensor is one analog input of the simulated microcontroller: which field of
// the engine state it reads and how the physical value becomes millivolts or
// ADC counts. The demo configuration carries the matching calibrations.
type Sensor struct {
	Field  string              // reading key in the line protocol, e.g. "a0"
	Counts bool                // report raw ADC counts instead of millivolts
	Read   func(State) float64 // physical value in canonical units
	ToMV   func(float64) float64
}

// adcBits and adcRefMV describe the simulated microcontroller's converter.
const (
	adcBits  = 10
	adcRefMV = 5000.0
)

// linearMV maps a physical value to millivolts on a straight line through
// (out0 → mv0) and (out1 → mv1), clamped to the supply rails.
func linearMV(mv0, out0, mv1, out1 float64) func(float64) float64 {
	return func(v float64) float64 {
		return clamp(mv0+(v-out0)*(mv1-mv0)/(out1-out0), 0, adcRefMV)
	}
}

// ntcMV gives the divider voltage of an NTC thermistor (Beta model) to ground
// under a pull-up to the reference: V = Vref·R/(R+Rpu), R = R0·exp(B(1/T − 1/T0)).
func ntcMV(r0, t0C, beta, pullup float64) func(float64) float64 {
	return func(tc float64) float64 {
		r := r0 * math.Exp(beta*(1/(tc+273.15)-1/(t0C+273.15)))
		return adcRefMV * r / (r + pullup)
	}
}

// DemoSensors returns the demo car's sensor set. The calibrations in the
// embedded demo configuration are the inverse of these.
func DemoSensors() []Sensor {
	ntc := ntcMV(2500, 25, 3950, 2490)
	return []Sensor{
		{Field: "a0", Read: func(s State) float64 { return s.ManifoldPressure }, ToMV: linearMV(400, 20000, 4650, 300000)},
		{Field: "a1", Counts: true, Read: func(s State) float64 { return s.IntakeAirTemp }, ToMV: ntc},
		{Field: "a2", Counts: true, Read: func(s State) float64 { return s.CoolantTemp }, ToMV: ntc},
		{Field: "a3", Counts: true, Read: func(s State) float64 { return s.OilTemp }, ToMV: ntc},
		{Field: "a4", Read: func(s State) float64 { return lambdaVolts(s.Lambda) }, ToMV: linearMV(0, 0, 5000, 5)},
		{Field: "a5", Read: func(s State) float64 { return s.Throttle }, ToMV: linearMV(500, 0, 4500, 1)},
		{Field: "a6", Read: func(s State) float64 { return s.OilPressure }, ToMV: linearMV(500, 0, 4500, 1000000)},
		{Field: "a7", Read: func(s State) float64 { return s.BaroPressure }, ToMV: linearMV(200, 15000, 4800, 115000)},
		{Field: "a8", Read: func(s State) float64 { return s.ExhaustTemp }, ToMV: linearMV(0, 0, 5000, 1000)},
		{Field: "a9", Counts: true, Read: func(s State) float64 { return s.ChargeTempPre }, ToMV: ntc},
		{Field: "a10", Read: func(s State) float64 { return s.CompressorOut }, ToMV: linearMV(400, 20000, 4650, 300000)},
		{Field: "a11", Read: func(s State) float64 { return s.AmbientTemp }, ToMV: linearMV(500, -40, 4500, 120)},
		{Field: "a12", Read: func(s State) float64 { return s.Humidity }, ToMV: linearMV(0, 0, 5000, 1)},
		{Field: "a13", Read: func(s State) float64 { return s.Torque }, ToMV: linearMV(500, 0, 4500, 800)},
		{Field: "a14", Read: func(s State) float64 { return s.EngineSpeed }, ToMV: linearMV(0, 0, 5000, 10000)},
	}
}

// lambdaVolts is the demo wideband controller's linear output: 0 V at λ 0.68,
// 5 V at λ 1.36 (an invented but typical span).
func lambdaVolts(l float64) float64 {
	return clamp((l-0.68)/(1.36-0.68)*5, 0, 5)
}

// Raw returns a sensor's reading as the microcontroller reports it: millivolts,
// or ADC counts rounded like a converter would.
func (s Sensor) Raw(st State) float64 {
	mv := s.ToMV(s.Read(st))
	if s.Counts {
		full := float64(int(1)<<adcBits - 1)
		return math.Round(mv / adcRefMV * full)
	}
	return math.Round(mv)
}
