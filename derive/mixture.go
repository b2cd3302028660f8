package derive

import (
	"fmt"
	"sort"
)

// Fuel is a fuel's stoichiometric air-fuel ratio (by mass) and liquid
// density at about 15 °C (gases: at 0 °C and 101.325 kPa).
type Fuel struct {
	Name          string
	Stoich        float64 // kg air per kg fuel at λ = 1
	Density       float64 // kg/m³
	StoichSource  string
	DensitySource string
}

// fuels is read-only.
var fuels = map[string]Fuel{
	"gasoline": {"gasoline", 14.7, 745, "common value; Heywood App. D gives 14.6 for CH1.87", "EN 228 range 720–775 kg/m³ at 15 °C, middle value"},
	"diesel":   {"diesel", 14.5, 832, "common value (14.6 also seen)", "EN 590 range 820–845 kg/m³ at 15 °C, middle value"},
	"e100":     {"e100", 9.0, 789, "ethanol C2H5OH by the combustion equation (8.98)", "CRC Handbook 0.7893 g/cm³ at 20 °C, from memory"},
	"e85":      {"e85", 9.8, 782, "85 vol% ethanol blend, derived by mass fraction", "blend of the two densities, derived"},
	"methanol": {"methanol", 6.47, 791, "Heywood, from memory", "from memory, 791–792 kg/m³ at 20 °C"},
	"lpg":      {"lpg", 15.5, 540, "common value for propane-butane mixtures", "from memory, 500–580 kg/m³ liquid"},
	"cng":      {"cng", 17.2, 0.717, "methane CH4 by the combustion equation (17.19)", "methane gas at 0 °C, 101.325 kPa, from memory"},
}

// LookupFuel returns a named fuel.
func LookupFuel(name string) (Fuel, error) {
	f, ok := fuels[name]
	if !ok {
		var names []string
		for k := range fuels {
			names = append(names, k)
		}
		sort.Strings(names)
		return Fuel{}, fmt.Errorf("unknown fuel %q (known: %v)", name, names)
	}
	return f, nil
}

// Wideband is the linear analog output of a wideband lambda controller:
// VoltsLow at LambdaLow, VoltsHigh at LambdaHigh.
type Wideband struct {
	VoltsLow, LambdaLow, VoltsHigh, LambdaHigh float64
}

// Lambda returns the equivalence ratio λ for an output voltage.
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
