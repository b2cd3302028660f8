package derive

import "math"

// CompressorInletPressure returns the compressor inlet absolute pressure
// (Pa): the inlet sensor when there is one (haveSensor), otherwise the
// barometric pressure less the air-filter pressure drop.
func CompressorInletPressure(sensorPa float64, haveSensor bool, baroPa, filterDropPa float64) float64 {
	if haveSensor {
		return sensorPa
	}
	return baroPa - filterDropPa
}

// IsentropicOutletTemperature returns the compressor outlet temperature of
// an ideal (isentropic) compression, in kelvin, from the inlet temperature t1K
// (kelvin), the total pressure ratio pr and γ: T2s = T1·pr^((γ−1)/γ).
// It gives NaN for a non-positive ratio, temperature or γ ≤ 1.
func IsentropicOutletTemperature(t1K, pr, gamma float64) float64 {
	if !(t1K > 0) || !(pr > 0) || !(gamma > 1) {
		return math.NaN()
	}
	return t1K * math.Pow(pr, (gamma-1)/gamma)
}

// CompressorEfficiency returns the total-to-total isentropic efficiency
// η_c = (T2s − T1)/(T2 − T1) of a compressor with inlet and outlet
// temperatures t1C and t2C (°C, converted to kelvin) at pressure ratio pr,
// for dry air (γ = Gamma). It gives NaN when the outlet is not warmer than
// the inlet or the inputs are not physical. Source: the ideal-gas relation
// T2s = T1·(p2/p1)^((γ−1)/γ), Heywood §6.8 (from memory).
func CompressorEfficiency(t1C, t2C, pr float64) float64 {
	t1, t2 := t1C+ZeroCelsius, t2C+ZeroCelsius
	if !(t2 > t1) {
		return math.NaN()
	}
	t2s := IsentropicOutletTemperature(t1, pr, Gamma)
	return (t2s - t1) / (t2 - t1)
}

// CompressorOutletTemperature returns the outlet temperature (°C) a
// compressor of isentropic efficiency eff reaches from t1C (°C) at pressure
// ratio pr: T2 = T1 + (T2s − T1)/η. NaN for a non-positive efficiency.
func CompressorOutletTemperature(t1C, pr, eff float64) float64 {
	if !(eff > 0) {
		return math.NaN()
	}
	t1 := t1C + ZeroCelsius
	t2s := IsentropicOutletTemperature(t1, pr, Gamma)
	return t1 + (t2s-t1)/eff - ZeroCelsius
}

// CompressorPower returns the compressor shaft power in watts absorbed by
// air mass flow m (kg/s) heated from t1C to t2C: P = ṁ·cp·(T2 − T1), with
// cp = CpAir.
func CompressorPower(m, t1C, t2C float64) float64 { return m * CpAir * (t2C - t1C) }

// FlowReference is the reference state for corrected (referred) compressor
// flow and speed: absolute pressure in Pa, temperature in kelvin.
type FlowReference struct {
	Pressure    float64 // Pa
	Temperature float64 // K
}

// StandardDay returns the standard-day reference of 101.325 kPa and 288.15 K
// (14.696 psia / 518.7 °R, Wikipedia "Corrected flow"). Compressor maps use
// differing references, so configure the one the map states.
func StandardDay() FlowReference { return FlowReference{StdPressure, StdTemperature} }

// CorrectedMassFlow returns ṁ·√(T1/Tref)/(p1/pref) for mass flow m (kg/s) at
// compressor inlet total pressure p1Pa and temperature t1C (°C), per
// Wikipedia "Corrected flow" and Isermann (2017) eq. 5.4.14. NaN for a
// non-positive inlet pressure or absolute temperature.
func (r FlowReference) CorrectedMassFlow(m, p1Pa, t1C float64) float64 {
	t1 := t1C + ZeroCelsius
	if !(p1Pa > 0) || !(t1 > 0) || !(r.Pressure > 0) || !(r.Temperature > 0) {
		return math.NaN()
	}
	return m * math.Sqrt(t1/r.Temperature) / (p1Pa / r.Pressure)
}

// CorrectedSpeed returns N/√(T1/Tref) for a shaft speed (any unit, e.g. rpm)
// at inlet temperature t1C (°C), per Wikipedia "Corrected flow" and
// Isermann (2017) eq. 5.4.15. NaN for a non-positive absolute temperature.
func (r FlowReference) CorrectedSpeed(speed, t1C float64) float64 {
	t1 := t1C + ZeroCelsius
	if !(t1 > 0) || !(r.Temperature > 0) {
		return math.NaN()
	}
	return speed / math.Sqrt(t1/r.Temperature)
}

// IntercoolerEffectiveness returns ε = (T_in − T_out)/(T_in − T_cool) of a
// charge-air cooler with charge inlet tInC (compressor discharge), charge
// outlet tOutC (manifold) and coolant inlet tCoolC (ambient air for
// air-to-air), all °C: the temperature drop over the largest drop
// available (Heywood, from memory). NaN when T_in equals T_cool.
func IntercoolerEffectiveness(tInC, tOutC, tCoolC float64) float64 {
	if tInC == tCoolC {
		return math.NaN()
	}
	return (tInC - tOutC) / (tInC - tCoolC)
}
