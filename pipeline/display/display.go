// Package display shows channel values to people: in the units a person
// chose (kPa, bar or psi; °C or °F; kW or one of the two horsepowers; …),
// rounded to what the quantity deserves, with the unit's symbol, and with no
// float noise (0.9998720000000001 λ reads "1.000", 220749.64 W reads
// "221 kW"). Canonical SI stays everywhere else (MQTT, Prometheus,
// recordings); this layer is only for the edges a person reads: the console,
// the CLI, plots. It is pure: no I/O, no clocks, no global mutable state.
//
// Conversion factors are those of NIST SP 811 (2008), Appendix B, computed
// from their exact definitions (the international foot and pound, standard
// gravity) where the appendix rounds.
package display

import (
	"fmt"
	"math"
	"strconv"
	"strings"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// Exact definitions the factors are computed from (NIST SP 811 (2008),
// Appendix B.8, each marked exact there).
const (
	poundKg       = 0.45359237 // pound (avoirdupois), kg
	standardG     = 9.80665    // standard acceleration of gravity, m/s²
	footM         = 0.3048     // international foot, m
	inchM         = 0.0254     // inch, m
	poundForceN   = poundKg * standardG
	mileM         = 5280 * footM
	usGallonM3    = 231 * inchM * inchM * inchM // 231 in³
	hourS         = 3600
	celsiusOffset = 32 // °F at 0 °C
)

// Conversion factors: how many canonical units one display unit is.
const (
	// PascalsPerPSI is one pound-force per square inch in pascals
	// (NIST SP 811 B.8: 6.894 757 E+03).
	PascalsPerPSI = poundForceN / (inchM * inchM)
	// PascalsPerBar is one bar in pascals (exact; NIST SP 811 B.8).
	PascalsPerBar = 1e5
	// WattsPerHPMech is one mechanical horsepower, 550 ft·lbf/s, in watts
	// (NIST SP 811 B.8: 7.456 999 E+02).
	WattsPerHPMech = 550 * footM * poundForceN
	// WattsPerHPMetric is one metric horsepower (PS), 75 kgf·m/s, in watts
	// (exact: 735.498 75; NIST SP 811 B.8 rounds it to 7.354 988 E+02).
	WattsPerHPMetric = 75 * standardG
	// NewtonMetresPerLbfFt is one pound-force foot in newton metres
	// (NIST SP 811 B.8: 1.355 818 E+00).
	NewtonMetresPerLbfFt = poundForceN * footM
	// MetresPerSecondPerMPH is one mile per hour in metres per second
	// (exact; NIST SP 811 B.8: 4.4704 E-01).
	MetresPerSecondPerMPH = mileM / hourS
	// CubicMetresPerUSGallon is one US liquid gallon in cubic metres
	// (NIST SP 811 B.8: 3.785 412 E-03).
	CubicMetresPerUSGallon = usGallonM3
	// KilogramsPerPound is one pound (avoirdupois) in kilograms (exact).
	KilogramsPerPound = poundKg
)

// Value is one value as a person reads it.
type Value struct {
	// Number is the value in Unit, rounded to Decimals places (half away
	// from zero; never -0). Meaningless when !OK.
	Number   float64
	Decimals int
	// Unit is the unit's symbol ("kPa", "°F", "hp", "PS", "%", "λ",
	// "AFR"), "" for a plain number.
	Unit string
	// Gauge is set for a pressure shown relative to the ambient (boost
	// gauge, oil pressure), unset for an absolute one and for every other
	// quantity.
	Gauge bool
	// OK is unset when the value is NaN or infinite: there is no number.
	OK bool
}

// NoNumber is what Text shows for a value that is not a number.
const NoNumber = "—"

// AppendText appends the number alone ("1.000", "221", NoNumber) to b.
func (v Value) AppendText(b []byte) []byte {
	if !v.OK {
		return append(b, NoNumber...)
	}
	if math.Abs(v.Number) < 1<<53 {
		return strconv.AppendFloat(b, v.Number, 'f', v.Decimals, 64)
	}
	// Every float this large is a whole number, and its exact binary
	// expansion has digits no measurement has: the shortest digits that
	// read back to it, then the decimals' zeros.
	b = strconv.AppendFloat(b, v.Number, 'f', -1, 64)
	if v.Decimals > 0 {
		b = append(b, '.')
		for range v.Decimals {
			b = append(b, '0')
		}
	}
	return b
}

// Text returns the number alone, as AppendText writes it.
func (v Value) Text() string { return string(v.AppendText(make([]byte, 0, 24))) }

// Append appends the number, its unit and, for a gauge pressure, the word
// "gauge" to b: "1.000 λ", "221 kW", "0.85 bar gauge", "45 %", "12.5°".
// The number and the unit are separated by a space (the SI brochure's rule,
// also for % and °C), except the plane-angle degree.
func (v Value) Append(b []byte) []byte {
	b = v.AppendText(b)
	if v.Unit != "" {
		if v.Unit != "°" {
			b = append(b, ' ')
		}
		b = append(b, v.Unit...)
	}
	if v.Gauge {
		b = append(b, " gauge"...)
	}
	return b
}

// String returns the value as Append writes it.
func (v Value) String() string { return string(v.Append(make([]byte, 0, 32))) }

// Config is the display layer's configuration: the default units (a
// browser may override them) and the engine's fuel, whose stoichiometric
// ratio turns λ into an air-fuel ratio.
type Config struct {
	Units Units
	Fuel  string // one of derive.FuelNames; "" means gasoline
}

// Formatter turns canonical values into values for people. Make one with
// New; the zero value shows the metric defaults with gasoline's
// stoichiometric ratio. A Formatter is a small value, safe to copy and to
// use from many goroutines.
type Formatter struct {
	units  Units
	fuel   string
	stoich float64
}

// New returns a Formatter for cfg. It refuses a fuel derive does not know.
func New(cfg Config) (Formatter, error) {
	name := cfg.Fuel
	if name == "" {
		name = "gasoline"
	}
	f, err := derive.LookupFuel(name)
	if err != nil {
		return Formatter{}, fmt.Errorf("display: %w", err)
	}
	return Formatter{units: cfg.Units, fuel: f.Name, stoich: f.Stoich}, nil
}

// Parse returns a Formatter for unit choices in their compact form (""
// for the metric defaults) and a fuel, as a command line gives them.
func Parse(compact, fuel string) (Formatter, error) {
	u, err := ParseUnits(compact)
	if err != nil {
		return Formatter{}, err
	}
	return New(Config{Units: u, Fuel: fuel})
}

// Units returns the formatter's unit choices.
func (f Formatter) Units() Units { return f.units }

// Fuel returns the fuel whose stoichiometric ratio AFR uses.
func (f Formatter) Fuel() string {
	if f.fuel == "" {
		return "gasoline"
	}
	return f.fuel
}

// Stoich returns the stoichiometric air-fuel ratio AFR uses.
func (f Formatter) Stoich() float64 {
	if f.stoich == 0 {
		return gasolineStoich
	}
	return f.stoich
}

// gasolineStoich is derive's gasoline ratio, for the zero Formatter.
var gasolineStoich = func() float64 {
	g, err := derive.LookupFuel("gasoline")
	if err != nil {
		panic(err) // derive's own table: a programming error
	}
	return g.Stoich
}()

// WithUnits returns a copy of f with other unit choices (a browser's
// override of the configured default).
func (f Formatter) WithUnits(u Units) Formatter {
	f.units = u
	return f
}

// Override returns a copy of f with the compact form s (a browser's
// choices, "pressure=psi,temperature=F") applied on top of f's units; the
// items s lacks keep f's. A refusal is a *ParseError naming the item.
func (f Formatter) Override(s string) (Formatter, error) {
	u := f.units
	if err := u.Set(s); err != nil {
		return f, err
	}
	return f.WithUnits(u), nil
}

// Format returns v, a value of ch in ch's canonical unit, as a person reads
// it in f's units. Pressures the Boost choice would show against the
// ambient are shown as measured: use FormatAgainst to supply it.
func (f Formatter) Format(ch pipeline.Channel, v float64) Value {
	return f.FormatAgainst(ch, v, math.NaN())
}

// FormatAgainst is Format with the barometric pressure baro (Pa, absolute)
// against which the Boost choice shows manifold and boost pressures: with
// Gauge, an absolute manifold pressure is shown as v − baro; with
// Absolute, boost_pressure is shown as v + baro. A baro that is NaN,
// infinite or not positive is unknown, and the value is shown as measured
// (Value.Gauge says which it is). Other channels ignore baro.
func (f Formatter) FormatAgainst(ch pipeline.Channel, v, baro float64) Value {
	s := f.scale(ch, v, baro)
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return Value{Unit: s.symbol, Decimals: max(s.decimals, 0), Gauge: s.gauge}
	}
	x := (v+s.shift)*s.factor + s.offset
	d := s.decimals
	if d < 0 { // a quantity with no rule: four significant digits
		d = sigDecimals(x, 4)
	}
	return Value{Number: round(x, d), Decimals: d, Unit: s.symbol, Gauge: s.gauge, OK: true}
}

// Scale is an affine conversion of a channel from its canonical unit to the
// unit a person reads: shown = canonical × Factor + Offset. It is what a
// plot axis needs.
type Scale struct {
	Factor, Offset float64
	Unit           string // the symbol, "" for a plain number
	Gauge          bool   // a pressure shown relative to the ambient
}

// Apply converts one canonical value.
func (s Scale) Apply(v float64) float64 { return v*s.Factor + s.Offset }

// Label is the unit as an axis label writes it: "kPa", "kPa gauge", "".
func (s Scale) Label() string {
	if s.Gauge && s.Unit != "" {
		return s.Unit + " gauge"
	}
	return s.Unit
}

// ScaleOf returns the conversion f applies to ch, without a barometric
// pressure (every channel as measured), for a plot's axis.
func (f Formatter) ScaleOf(ch pipeline.Channel) Scale {
	s := f.scale(ch, 0, math.NaN())
	return Scale{Factor: s.factor, Offset: s.shift*s.factor + s.offset, Unit: s.symbol, Gauge: s.gauge}
}

// scaling is how one channel is shown: (v + shift) × factor + offset,
// rounded to decimals (negative: by significant digits).
type scaling struct {
	shift, factor, offset float64
	decimals              int
	symbol                string
	gauge                 bool
}

// boostChannels are the absolute pressures a person reads as boost: the
// manifold pressure and the compressor outlet, the ECU's manifold and boost
// pressures.
var boostChannels = map[string]bool{
	"manifold_pressure": true, "compressor_outlet_pressure": true,
	"ecu_manifold_pressure": true, "ecu_manifold_pressure_wide_a": true, "ecu_manifold_pressure_wide_b": true,
	"ecu_boost_pressure_a": true, "ecu_boost_pressure_b": true, "ecu_boost_commanded_a": true, "ecu_boost_commanded_b": true,
}

// IsBoostChannel reports whether the Boost choice applies to the channel
// named: boost_pressure (relative) and the absolute manifold and boost
// pressures.
func IsBoostChannel(name string) bool { return name == "boost_pressure" || boostChannels[name] }

// percentQuantities are the ratios a person reads as percentages, with
// their decimals.
func percentDecimals(quantity string) (int, bool) {
	switch quantity {
	case "throttle_position", "volumetric_efficiency", "compressor_efficiency", "intercooler_effectiveness",
		"relative_humidity", "load", "position", "level", "fraction", "torque_fraction":
		return 0, true
	case "fuel_trim", "error":
		return 1, true
	}
	return 0, false
}

// scale chooses the scaling of ch's value v (for the boost reference,
// which depends on whether baro is known).
func (f Formatter) scale(ch pipeline.Channel, v, baro float64) scaling {
	u := f.units
	q := ch.Quantity
	switch {
	case ch.Unit == pipeline.Pascal && (q == "pressure" || q == "relative_pressure"):
		s := scaling{factor: 1e-3, decimals: 0, symbol: "kPa", gauge: q == "relative_pressure"}
		switch u.Pressure {
		case Bar:
			s.factor, s.decimals, s.symbol = 1/PascalsPerBar, 2, "bar"
		case PSI:
			s.factor, s.decimals, s.symbol = 1/PascalsPerPSI, 1, "psi"
		}
		known := baro > 0 && !math.IsInf(baro, 0)
		switch {
		case u.Boost == Gauge && known && boostChannels[ch.Name]:
			s.shift, s.gauge = -baro, true
		case u.Boost == Absolute && known && ch.Name == "boost_pressure":
			s.shift, s.gauge = baro, false
		}
		return s
	case ch.Unit == pipeline.Celsius && q == "temperature":
		if u.Temperature == Fahrenheit {
			return scaling{factor: 9.0 / 5, offset: celsiusOffset, symbol: "°F"}
		}
		return scaling{factor: 1, symbol: "°C"}
	case ch.Unit == pipeline.Watts && q == "power":
		switch u.Power {
		case HPMech:
			return scaling{factor: 1 / WattsPerHPMech, symbol: "hp"}
		case HPMetric:
			return scaling{factor: 1 / WattsPerHPMetric, symbol: "PS"}
		}
		return scaling{factor: 1e-3, symbol: "kW"}
	case ch.Unit == pipeline.NewtonMetres && q == "torque":
		if u.Torque == PoundFoot {
			return scaling{factor: 1 / NewtonMetresPerLbfFt, symbol: "lbf·ft"}
		}
		return scaling{factor: 1, symbol: "N·m"}
	case ch.Unit == pipeline.GramsPerSec && (q == "mass_flow" || q == "corrected_mass_flow"):
		switch u.MassFlow {
		case KilogramsPerHour:
			return scaling{factor: hourS * 1e-3, decimals: 1, symbol: "kg/h"}
		case PoundsPerMinute:
			return scaling{factor: 60 * 1e-3 / KilogramsPerPound, decimals: 2, symbol: "lb/min"}
		}
		return scaling{factor: 1, decimals: 1, symbol: "g/s"}
	case ch.Unit == pipeline.Ratio && (q == "lambda" || q == "lambda_error"):
		if u.Mixture == AFR {
			return scaling{factor: f.Stoich(), decimals: 1, symbol: "AFR"}
		}
		return scaling{factor: 1, decimals: 3, symbol: "λ"}
	case ch.Unit == pipeline.Ratio && q == "air_fuel_ratio":
		return scaling{factor: 1, decimals: 1, symbol: "AFR"}
	case ch.Unit == pipeline.MetresPerSecond && q == "vehicle_speed":
		if u.Speed == MPH {
			return scaling{factor: 1 / MetresPerSecondPerMPH, symbol: "mph"}
		}
		return scaling{factor: hourS * 1e-3, symbol: "km/h"}
	case ch.Unit == pipeline.CubicMetresPerS && q == "volume_flow":
		if u.VolumeFlow == GallonsPerHour {
			return scaling{factor: hourS / CubicMetresPerUSGallon, decimals: 2, symbol: "gal/h"}
		}
		return scaling{factor: hourS * 1e3, decimals: 1, symbol: "L/h"}
	case ch.Unit == pipeline.RPM:
		return scaling{factor: 1, symbol: "rpm"}
	case ch.Unit == pipeline.Ratio:
		if d, ok := percentDecimals(q); ok {
			return scaling{factor: 100, decimals: d, symbol: "%"}
		}
		switch q {
		case "pressure_ratio":
			return scaling{factor: 1, decimals: 2}
		case "power_correction_factor":
			return scaling{factor: 1, decimals: 3}
		}
		return scaling{factor: 1, decimals: -1}
	case ch.Unit == pipeline.GramsPerJoule:
		return scaling{factor: hourS * 1e3, symbol: "g/kWh"} // 1 kWh = 3.6 MJ
	case ch.Unit == pipeline.Volts:
		return scaling{factor: 1, decimals: 2, symbol: "V"}
	case ch.Unit == pipeline.Amperes:
		return scaling{factor: 1e3, decimals: 2, symbol: "mA"}
	case ch.Unit == pipeline.Degrees:
		return scaling{factor: 1, decimals: 1, symbol: "°"}
	case ch.Unit == pipeline.Seconds:
		return scaling{factor: 1, symbol: "s"}
	case ch.Unit == pipeline.None || ch.Unit == pipeline.Count:
		return scaling{factor: 1} // states, counts, gears: whole numbers
	}
	// A canonical unit without a rule: its own name, four significant digits.
	return scaling{factor: 1, decimals: -1, symbol: strings.ReplaceAll(string(ch.Unit), "_", " ")}
}

// pow10 are the powers of ten rounding uses.
var pow10 = [...]float64{1, 10, 100, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9}

// maxDecimals bounds the decimals of the significant-digit rule.
const maxDecimals = len(pow10) - 1

// round rounds x to d decimals, half away from zero, and never returns -0.
func round(x float64, d int) float64 {
	p := pow10[d]
	r := math.Round(x*p) / p
	if math.IsInf(r, 0) || math.IsNaN(r) { // x·p overflowed: x has no decimals to lose
		r = x
	}
	if r == 0 {
		return 0
	}
	return r
}

// sigDecimals returns how many decimals show n significant digits of x,
// between 0 and maxDecimals.
func sigDecimals(x float64, n int) int {
	if x == 0 {
		return 0
	}
	d := n - 1 - int(math.Floor(math.Log10(math.Abs(x))))
	return min(max(d, 0), maxDecimals)
}
