package derive

import (
	"fmt"
	"math"
)

// Fuel is a fuel's stoichiometric air-fuel ratio (by mass) and density
// (liquids at about 15–20 °C, gases at 0 °C and 101.325 kPa), with where each
// value comes from.
type Fuel struct {
	Name          string  // as LookupFuel knows it
	Stoich        float64 // kg air per kg fuel at λ = 1
	Density       float64 // kg/m³
	StoichSource  string  // where Stoich comes from
	DensitySource string  // where Density comes from
}

// FuelNames returns the names LookupFuel accepts.
func FuelNames() []string {
	return []string{"gasoline", "diesel", "e100", "e85", "methanol", "propane", "lpg", "cng"}
}

// LookupFuel returns a named fuel (one of FuelNames).
func LookupFuel(name string) (Fuel, error) {
	switch name {
	case "gasoline":
		return Fuel{"gasoline", 14.7, 745,
			"14.7 common value; Heywood App. D gives 14.6 for CH1.87 (from memory)",
			"EN 228 range 720–775 kg/m³ at 15 °C, middle value (from memory)"}, nil
	case "diesel":
		return Fuel{"diesel", 14.5, 832,
			"14.5 common value (14.6 also seen)",
			"EN 590 range 820–845 kg/m³ at 15 °C, middle value"}, nil
	case "e100":
		return Fuel{"e100", 9.0, 789,
			"ethanol C2H5OH by the combustion equation: 3·4.76·28.97/46.07 = 8.98",
			"CRC Handbook 0.7893 g/cm³ at 20 °C (from memory)"}, nil
	case "e85":
		return Fuel{"e85", 9.8, 782,
			"85 vol% ethanol (mass fraction 0.857) blended by mass fraction, derived: 9.80",
			"blend of the gasoline and ethanol densities by volume, derived"}, nil
	case "methanol":
		return Fuel{"methanol", 6.47, 791,
			"Heywood (from memory); CH3OH by the combustion equation 6.46",
			"791–792 kg/m³ at 20 °C (from memory)"}, nil
	case "propane":
		return Fuel{"propane", 15.67, 507,
			"Heywood / Wikipedia \"Air–fuel ratio\" (from memory); C3H8 by the combustion equation 15.64",
			"liquid propane ≈507 kg/m³ at 15 °C (from memory)"}, nil
	case "lpg":
		return Fuel{"lpg", 15.5, 540,
			"15.5 common value for propane-butane mixtures (propane 15.67, butane 15.42 by the combustion equation)",
			"LPG liquid 500–580 kg/m³, middle value (from memory)"}, nil
	case "cng":
		return Fuel{"cng", 17.2, 0.717,
			"methane CH4 by the combustion equation: 2·4.76·28.97/16.04 = 17.19",
			"methane gas at 0 °C and 101.325 kPa (from memory)"}, nil
	}
	return Fuel{}, fmt.Errorf("unknown fuel %q (known: %v)", name, FuelNames())
}

// Wideband is the linear analog output of a wideband lambda controller:
// VoltsLow at LambdaLow, VoltsHigh at LambdaHigh (for example 0 V at 0.68
// and 5 V at 1.36).
type Wideband struct {
	VoltsLow, LambdaLow, VoltsHigh, LambdaHigh float64 // two points of the output line: V, λ
}

// Validate checks that the two calibration points are finite, distinct in
// voltage and give positive lambdas.
func (w Wideband) Validate() error {
	for _, f := range []struct {
		name string
		v    float64
	}{{"volts_low", w.VoltsLow}, {"lambda_low", w.LambdaLow}, {"volts_high", w.VoltsHigh}, {"lambda_high", w.LambdaHigh}} {
		if math.IsNaN(f.v) || math.IsInf(f.v, 0) {
			return fmt.Errorf("wideband: %s is not finite", f.name)
		}
	}
	if w.VoltsHigh == w.VoltsLow {
		return fmt.Errorf("wideband: volts_high equals volts_low (%g V)", w.VoltsLow)
	}
	if !(w.LambdaLow > 0) || !(w.LambdaHigh > 0) {
		return fmt.Errorf("wideband: lambdas must be positive (lambda_low %g, lambda_high %g)", w.LambdaLow, w.LambdaHigh)
	}
	return nil
}

// Lambda returns the air-fuel equivalence ratio λ for an output voltage by
// the straight line through the two calibration points.
func (w Wideband) Lambda(volts float64) float64 {
	return w.LambdaLow + (volts-w.VoltsLow)*(w.LambdaHigh-w.LambdaLow)/(w.VoltsHigh-w.VoltsLow)
}

// AFR returns the air-fuel ratio by mass for λ and a stoichiometric ratio.
func AFR(lambda, stoich float64) float64 { return lambda * stoich }

// FuelMassFlow returns fuel mass flow (kg/s) from air mass flow (kg/s), λ and
// the stoichiometric ratio: ṁ_f = ṁ_a/(λ·AFR_s). Non-positive λ gives 0.
func FuelMassFlow(air, lambda, stoich float64) float64 {
	if lambda <= 0 || stoich <= 0 {
		return 0
	}
	return air / (lambda * stoich)
}

// FuelVolumeFlow returns volume flow (m³/s) from mass flow (kg/s) and density.
func FuelVolumeFlow(mass, density float64) float64 {
	if density <= 0 {
		return 0
	}
	return mass / density
}
