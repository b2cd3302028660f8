package derive

import (
	"fmt"
	"math"
)

// PowerFromTorque returns brake power in watts from torque (N·m) and engine
// speed (rpm): P = 2π·N·T with N in rev/s (Heywood eq. 2.2, from memory).
func PowerFromTorque(torqueNm, rpm float64) float64 { return 2 * math.Pi * (rpm / 60) * torqueNm }

// TorqueFromPower is the inverse of PowerFromTorque: T = P/(2π·N). NaN at
// zero speed.
func TorqueFromPower(powerW, rpm float64) float64 {
	if rpm == 0 {
		return math.NaN()
	}
	return powerW / (2 * math.Pi * (rpm / 60))
}

// SaturationVapourPressure returns the saturation vapour pressure of water
// over liquid water, in Pa, at tC (°C), by the Arden Buck equation (Buck,
// J. Appl. Meteorol. 20, 1981, with the 1996 constants):
// e_s = 611.21·exp((18.678 − T/234.5)·(T/(257.14 + T))) (constants from
// memory; checked against the 0 °C and 100 °C points of water).
func SaturationVapourPressure(tC float64) float64 {
	return 611.21 * math.Exp((18.678-tC/234.5)*(tC/(257.14+tC)))
}

// DryPressure returns the partial pressure of dry air (Pa) in moist air at
// total pressure totalPa, temperature tC (°C) and relative humidity rh
// (ratio 0–1): p_d = p − rh·e_s(T) (Dalton's law).
func DryPressure(totalPa, tC, rh float64) float64 {
	return totalPa - rh*SaturationVapourPressure(tC)
}

// Ambient is the test-cell or inlet air state for power correction.
type Ambient struct {
	Pressure    float64 // total (barometric) pressure, Pa
	Temperature float64 // inlet air temperature, °C
	Humidity    float64 // relative humidity, ratio 0–1
}

// Standard names a power correction standard.
type Standard int

// The power correction standards. Corrected power = factor × observed.
const (
	// SAEJ1349 is SAE J1349 (JUN1990 and later) for spark-ignition engines:
	// CF = 1.18·(99/p_d)·√((T+273)/298) − 0.18, p_d dry pressure in kPa,
	// T in °C; reference 25 °C, 99 kPa dry.
	SAEJ1349 Standard = iota + 1
	// ISO1585 is ISO 1585 (= UNECE R85, 80/1269/EEC) for spark-ignition
	// engines: α = (99/p_s)^1.2·(T/298)^0.6, p_s dry pressure in kPa, T in
	// K; reference 298 K, 99 kPa dry; valid for 0.93 ≤ α ≤ 1.07 (from memory).
	ISO1585
	// DIN70020 is DIN 70020 (withdrawn): CF = (1013/p)·(T/293)^0.5, p total
	// pressure in mbar, T in K; reference 293 K, 1013 mbar total (formula
	// from memory).
	DIN70020
)

// ParseStandard returns the standard for a configuration name:
// "sae_j1349", "iso_1585" or "din_70020".
func ParseStandard(name string) (Standard, error) {
	switch name {
	case "sae_j1349":
		return SAEJ1349, nil
	case "iso_1585":
		return ISO1585, nil
	case "din_70020":
		return DIN70020, nil
	}
	return 0, fmt.Errorf("unknown power correction standard %q (known: sae_j1349, iso_1585, din_70020)", name)
}

// String returns the configuration name of the standard.
func (s Standard) String() string {
	switch s {
	case SAEJ1349:
		return "sae_j1349"
	case ISO1585:
		return "iso_1585"
	case DIN70020:
		return "din_70020"
	}
	return fmt.Sprintf("Standard(%d)", int(s))
}

// Reference returns the standard's reference condition: a state at which
// its correction factor is exactly 1 (dry air for the dry-pressure
// standards).
func (s Standard) Reference() Ambient {
	switch s {
	case SAEJ1349:
		return Ambient{Pressure: 99000, Temperature: 25}
	case ISO1585:
		return Ambient{Pressure: 99000, Temperature: 298 - ZeroCelsius}
	case DIN70020:
		return Ambient{Pressure: 101300, Temperature: 293 - ZeroCelsius}
	}
	return Ambient{}
}

// Factor returns the power correction factor for an ambient state. It
// returns an error naming the field for an unknown standard, a non-positive
// (dry) pressure or absolute temperature, or a humidity outside 0–1.
func (s Standard) Factor(a Ambient) (float64, error) {
	if !(a.Humidity >= 0 && a.Humidity <= 1) {
		return math.NaN(), fmt.Errorf("power correction: humidity %g outside 0–1", a.Humidity)
	}
	tK := a.Temperature + ZeroCelsius
	if !(tK > 0) || math.IsInf(tK, 0) {
		return math.NaN(), fmt.Errorf("power correction: temperature %g °C is not physical", a.Temperature)
	}
	if !(a.Pressure > 0) || math.IsInf(a.Pressure, 0) {
		return math.NaN(), fmt.Errorf("power correction: pressure %g Pa is not physical", a.Pressure)
	}
	pd := DryPressure(a.Pressure, a.Temperature, a.Humidity) / 1000 // kPa
	switch s {
	case SAEJ1349, ISO1585:
		if !(pd > 0) {
			return math.NaN(), fmt.Errorf("power correction: dry pressure %g kPa is not positive", pd)
		}
	}
	switch s {
	case SAEJ1349:
		return 1.18*(99/pd)*math.Sqrt((a.Temperature+273)/298) - 0.18, nil
	case ISO1585:
		return math.Pow(99/pd, 1.2) * math.Pow(tK/298, 0.6), nil
	case DIN70020:
		return (1013 / (a.Pressure / 100)) * math.Sqrt(tK/293), nil
	}
	return math.NaN(), fmt.Errorf("power correction: unknown standard %d", int(s))
}

// ISO1585Valid reports whether an ISO 1585 correction factor lies in the
// standard's validity range 0.93–1.07 (from memory).
func ISO1585Valid(alpha float64) bool { return alpha >= 0.93 && alpha <= 1.07 }

// CorrectedPower returns observed power (W) corrected to the standard's
// reference condition: factor × observed.
func CorrectedPower(observedW float64, s Standard, a Ambient) (float64, error) {
	f, err := s.Factor(a)
	if err != nil {
		return math.NaN(), err
	}
	return f * observedW, nil
}

// BSFC returns brake specific fuel consumption in kg/J (the canonical unit)
// from fuel mass flow (kg/s) and brake power (W): bsfc = ṁ_f/P_b (Heywood
// §2.7, from memory). NaN for non-positive power.
func BSFC(fuelKgPerS, powerW float64) float64 {
	if !(powerW > 0) {
		return math.NaN()
	}
	return fuelKgPerS / powerW
}

// GramsPerKWh converts a BSFC from kg/J to g/kWh (× 1000 g/kg × 3.6e6 J/kWh).
func GramsPerKWh(bsfcKgPerJ float64) float64 { return bsfcKgPerJ * 3.6e9 }

// FuelConversionEfficiency returns η_f = 1/(bsfc·Q_LHV) for a BSFC in kg/J
// and a lower heating value in J/kg (Heywood, from memory). NaN for a
// non-positive product.
func FuelConversionEfficiency(bsfcKgPerJ, lhvJPerKg float64) float64 {
	d := bsfcKgPerJ * lhvJPerKg
	if !(d > 0) {
		return math.NaN()
	}
	return 1 / d
}
