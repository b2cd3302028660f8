package display

import (
	"math"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// Every conversion factor against its published value. NIST SP 811 (2008)
// Appendix B.8 gives factors to 7 significant digits unless exact; the
// tolerance is half a unit in the last digit given.
func TestFactors(t *testing.T) {
	cases := []struct {
		name      string
		got, want float64
		tol       float64
		source    string
	}{
		{"psi in Pa", PascalsPerPSI, 6894.757, 0.0005, "NIST SP 811 (2008) B.8: pound-force per square inch 6.894 757 E+03 Pa"},
		{"bar in Pa", PascalsPerBar, 1e5, 0, "NIST SP 811 (2008) B.8: bar 1.0 E+05 Pa, exact"},
		{"hp (550 ft·lbf/s) in W", WattsPerHPMech, 745.6999, 0.00005, "NIST SP 811 (2008) B.8: horsepower (550 ft·lbf/s) 7.456 999 E+02 W"},
		{"metric hp in W", WattsPerHPMetric, 735.4988, 0.00005, "NIST SP 811 (2008) B.8: horsepower, metric 7.354 988 E+02 W"},
		{"metric hp in W, by definition", WattsPerHPMetric, 735.49875, 1e-9, "75 kgf·m/s with standard gravity 9.806 65 m/s² exact (NIST SP 811 B.8, kilogram-force); from memory that PS is 75 kgf·m/s"},
		{"lbf·ft in N·m", NewtonMetresPerLbfFt, 1.355818, 5e-7, "NIST SP 811 (2008) B.8: pound-force foot 1.355 818 E+00 N·m"},
		{"mph in m/s", MetresPerSecondPerMPH, 0.44704, 1e-15, "NIST SP 811 (2008) B.8: mile per hour 4.4704 E-01 m/s, exact"},
		{"US gallon in m³", CubicMetresPerUSGallon, 3.785412e-3, 5e-10, "NIST SP 811 (2008) B.8: gallon (U.S.) 3.785 412 E-03 m³"},
		{"lb in kg", KilogramsPerPound, 0.45359237, 0, "NIST SP 811 (2008) B.8: pound (avoirdupois) 4.535 923 7 E-01 kg, exact"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if d := math.Abs(c.got - c.want); d > c.tol {
				t.Errorf("%.12g, want %.12g ± %g (%s)", c.got, c.want, c.tol, c.source)
			}
		})
	}
}

// chanOf returns the catalogue's entry of a channel.
func chanOf(t testing.TB, name string) pipeline.Channel {
	t.Helper()
	c, ok := pipeline.Catalogued(name)
	if !ok {
		t.Fatalf("%s is not catalogued", name)
	}
	return c
}

// mustUnits parses the compact form or fails.
func mustUnits(t testing.TB, s string) Units {
	t.Helper()
	u, err := ParseUnits(s)
	if err != nil {
		t.Fatal(err)
	}
	return u
}

// Every conversion, through Format, with the quantity's rounding. Each row
// names where its expected value comes from.
func TestFormat(t *testing.T) {
	nan := math.NaN()
	cases := []struct {
		channel string
		units   string
		fuel    string
		v, baro float64
		want    string
		source  string
	}{
		// Mixture. AFR = λ × stoichiometric ratio of derive's fuel table.
		{"lambda", "", "", 0.9998720000000001, nan, "1.000 λ", "float noise rounded to 3 decimals"},
		{"lambda", "mixture=afr", "", 0.9998720000000001, nan, "14.7 AFR", "derive gasoline 14.7 × 0.999872 = 14.698"},
		{"lambda", "mixture=afr", "e85", 1, nan, "9.8 AFR", "derive e85 9.8"},
		{"lambda", "mixture=afr", "methanol", 0.8, nan, "5.2 AFR", "derive methanol 6.47 × 0.8 = 5.176"},
		{"lambda_error", "", "", -0.0004, nan, "0.000 λ", "never -0"},
		{"air_fuel_ratio", "", "", 12.54, nan, "12.5 AFR", "already an AFR"},
		// Power.
		{"brake_power", "", "", 220749.64, nan, "221 kW", "SI prefix k = 10³ (SI brochure, 9th ed., Table 7)"},
		{"brake_power", "power=hp_mech", "", 220749.64, nan, "296 hp", "NIST SP 811 B.8: 745.6999 W; 220749.64/745.6999 = 296.03"},
		{"corrected_power", "power=hp_metric", "", 220749.64, nan, "300 PS", "NIST SP 811 B.8: 735.4988 W; 220749.64/735.4988 = 300.14"},
		{"brake_power", "power=hp_mech", "", 745.6999, nan, "1 hp", "NIST SP 811 B.8"},
		// Volume flow.
		{"fuel_volume_flow", "", "", 3.4e-7, nan, "1.2 L/h", "L = 10⁻³ m³, h = 3600 s (SI brochure, 9th ed., Table 8): 3.4e-7 × 3.6e6 = 1.224"},
		{"ecu_fuel_rate", "volume_flow=gal/h", "", 3.4e-7, nan, "0.32 gal/h", "NIST SP 811 B.8: gallon (U.S.) 3.785 412 E-03 m³: 0.3233"},
		{"fuel_volume_flow", "volume_flow=gal/h", "", 3.785412e-3 / 3600, nan, "1.00 gal/h", "NIST SP 811 B.8"},
		// Pressure, absolute.
		{"manifold_pressure", "", "", 101325, nan, "101 kPa", "SI prefix k"},
		{"manifold_pressure", "pressure=bar", "", 101325, nan, "1.01 bar", "NIST SP 811 B.8: bar 1.0 E+05 Pa"},
		{"manifold_pressure", "pressure=psi", "", 101325, nan, "14.7 psi", "NIST SP 811 B.8: psi 6.894 757 E+03 Pa: 14.696"},
		{"baro_pressure", "pressure=psi", "", 6894.757, nan, "1.0 psi", "NIST SP 811 B.8"},
		{"ecu_fuel_pressure", "pressure=bar", "", 350000, nan, "3.50 bar", "NIST SP 811 B.8: bar"},
		// Pressure, boost: the reference is the caller's barometric pressure.
		{"boost_pressure", "", "", 80000, nan, "80 kPa gauge", "boost_pressure is relative"},
		{"boost_pressure", "pressure=bar", "", 80000, 101325, "0.80 bar gauge", "as measured ignores the reference"},
		{"boost_pressure", "pressure=psi", "", 1e5, nan, "14.5 psi gauge", "NIST SP 811 B.8: 14.504"},
		{"boost_pressure", "boost=absolute", "", 80000, 101325, "181 kPa", "80 + 101.325"},
		{"boost_pressure", "boost=absolute", "", 80000, nan, "80 kPa gauge", "no reference: as measured"},
		{"boost_pressure", "boost=gauge", "", 80000, 101325, "80 kPa gauge", "already gauge"},
		{"manifold_pressure", "boost=gauge", "", 181325, 101325, "80 kPa gauge", "181.325 − 101.325"},
		{"manifold_pressure", "boost=gauge,pressure=bar", "", 30000, 100000, "-0.70 bar gauge", "vacuum: 30 − 100 kPa"},
		{"manifold_pressure", "boost=gauge", "", 181325, nan, "181 kPa", "no reference: as measured"},
		{"manifold_pressure", "boost=gauge", "", 181325, -1, "181 kPa", "a non-positive reference is unknown"},
		{"ecu_boost_pressure_a", "boost=gauge,pressure=psi", "", 101325 + 6894.757, 101325, "1.0 psi gauge", "NIST SP 811 B.8"},
		{"baro_pressure", "boost=gauge", "", 101325, 101325, "101 kPa", "the Boost choice leaves other pressures alone"},
		{"oil_pressure", "pressure=bar,boost=absolute", "", 350000, 101325, "3.50 bar gauge", "oil pressure is relative and not boost"},
		// Temperature: t/°F = 1.8 · t/°C + 32 (NIST SP 811 (2008) B.9 and 4.2.1.1, from memory on the section).
		{"coolant_temp", "", "", 90.4, nan, "90 °C", "SI brochure: a space before °C"},
		{"coolant_temp", "temperature=F", "", 100, nan, "212 °F", "NIST SP 811: 1.8 × 100 + 32"},
		{"intake_air_temp", "temperature=F", "", 0, nan, "32 °F", "NIST SP 811"},
		{"ambient_temp", "temperature=F", "", -40, nan, "-40 °F", "NIST SP 811: −40 °C = −40 °F"},
		{"oil_temp", "temperature=F", "", 37, nan, "99 °F", "98.6 rounded"},
		// Torque.
		{"dyno_torque", "", "", 400.4, nan, "400 N·m", "SI"},
		{"dyno_torque", "torque=lbft", "", 400, nan, "295 lbf·ft", "NIST SP 811 B.8: 1.355 818 N·m: 295.02"},
		{"ecu_reference_torque", "torque=lbft", "", 1.355818, nan, "1 lbf·ft", "NIST SP 811 B.8"},
		// Mass flow.
		{"air_mass_flow", "", "", 100, nan, "100.0 g/s", "canonical"},
		{"air_mass_flow", "mass_flow=kg/h", "", 100, nan, "360.0 kg/h", "h = 3600 s (SI brochure Table 8)"},
		{"fuel_mass_flow", "mass_flow=lb/min", "", 100, nan, "13.23 lb/min", "NIST SP 811 B.8: lb 0.453 592 37 kg exact: 13.2277"},
		{"corrected_compressor_flow", "mass_flow=lb/min", "", 453.59237 / 60, nan, "1.00 lb/min", "NIST SP 811 B.8"},
		// Speed.
		{"ecu_vehicle_speed", "", "", 100 / 3.6, nan, "100 km/h", "SI brochure Table 8: km/h = 1/3.6 m/s"},
		{"ecu_vehicle_speed", "speed=mph", "", 26.8224, nan, "60 mph", "NIST SP 811 B.8: mph 0.447 04 m/s exact"},
		{"ecu_vehicle_speed", "speed=mph", "", 100 / 3.6, nan, "62 mph", "62.137"},
		// Engine speed, percentages, plain ratios.
		{"engine_speed", "", "", 6543.21, nan, "6543 rpm", "whole rpm"},
		{"ecu_turbo_speed_a", "", "", 152345.6, nan, "152346 rpm", "whole rpm"},
		{"throttle_position", "", "", 0.4537, nan, "45 %", "SI brochure 9th ed. 5.4.7: % = 0.01, a space before it (from memory)"},
		{"ambient_humidity", "", "", 0.5, nan, "50 %", "SI brochure 5.4.7"},
		{"compressor_efficiency", "", "", 0.7249, nan, "72 %", "SI brochure 5.4.7"},
		{"volumetric_efficiency", "", "", 0.9512, nan, "95 %", "SI brochure 5.4.7"},
		{"ecu_short_fuel_trim_bank1", "", "", -0.0234, nan, "-2.3 %", "trims to 0.1 %"},
		{"manifold_pressure_ratio", "", "", 2.0012, nan, "2.00", "two decimals"},
		{"correction_factor", "", "", 1.02345, nan, "1.023", "three decimals"},
		// Others.
		{"bsfc", "", "", 250 / 3.6e6, nan, "250 g/kWh", "NIST SP 811 B.8: kilowatt hour 3.6 E+06 J exact"},
		{"wideband_voltage", "", "", 2.5, nan, "2.50 V", "SI"},
		{"ecu_o2_s1_current", "", "", 0.0123, nan, "12.30 mA", "SI prefix m"},
		{"ecu_timing_advance", "", "", 12.5, nan, "12.5°", "SI brochure: no space before the plane-angle degree"},
		{"cooldown_idle_remaining", "", "", 39.6, nan, "40 s", "whole seconds"},
		{"gear", "", "", 3, nan, "3", "plain number"},
		{"warning_over_boost", "", "", 1, nan, "1", "a state"},
		{"ecu_dtc_count", "", "", 2, nan, "2", "a count"},
		// No number.
		{"lambda", "", "", nan, nan, "— λ", "NaN"},
		{"brake_power", "power=hp_mech", "", math.Inf(1), nan, "— hp", "infinite"},
	}
	for _, c := range cases {
		t.Run(c.channel+"/"+c.units+"/"+c.want, func(t *testing.T) {
			f, err := New(Config{Units: mustUnits(t, c.units), Fuel: c.fuel})
			if err != nil {
				t.Fatal(err)
			}
			got := f.FormatAgainst(chanOf(t, c.channel), c.v, c.baro).String()
			if got != c.want {
				t.Errorf("%g → %q, want %q (%s)", c.v, got, c.want, c.source)
			}
		})
	}
}

// The rounding rules: a fixed number of decimals per display unit, half
// away from zero, never -0; a quantity without a rule shows four
// significant digits.
func TestRounding(t *testing.T) {
	furlongs := pipeline.Channel{Name: "x", Quantity: "distance", Unit: "furlongs"}
	someRatio := pipeline.Channel{Name: "x", Quantity: "mystery_ratio", Unit: pipeline.Ratio}
	cases := []struct {
		name string
		ch   pipeline.Channel
		v    float64
		want string
	}{
		{"half away from zero", chanOf(t, "engine_speed"), 2.5, "3 rpm"},
		{"half away from zero, negative", chanOf(t, "engine_speed"), -2.5, "-3 rpm"},
		{"a binary tie rounds up, not to even", chanOf(t, "lambda"), 0.0625, "0.063 λ"},
		{"float noise", chanOf(t, "lambda"), 0.1 + 0.2, "0.300 λ"},
		{"float noise below", chanOf(t, "lambda"), 0.9999999999999999, "1.000 λ"},
		{"no negative zero", chanOf(t, "engine_speed"), -0.4, "0 rpm"},
		{"no negative zero, decimals", chanOf(t, "manifold_pressure_ratio"), -0.004, "0.00"},
		{"negative zero in", chanOf(t, "coolant_temp"), math.Copysign(0, -1), "0 °C"},
		{"large values keep their digits", chanOf(t, "brake_power"), 1e12, "1000000000 kW"},
		{"four significant digits", furlongs, 1234.5678, "1235 furlongs"},
		{"four significant digits, small", furlongs, 0.00123456, "0.001235 furlongs"},
		{"four significant digits, tiny: nine decimals at most", furlongs, 1.234e-12, "0.000000000 furlongs"},
		{"four significant digits, large", furlongs, 1e20, "100000000000000000000 furlongs"},
		{"four significant digits, zero", furlongs, 0, "0 furlongs"},
		{"a ratio without a rule", someRatio, 0.123456, "0.1235"},
		{"a ratio without a rule, negative", someRatio, -12.345678, "-12.35"},
		{"huge value with decimals does not overflow", furlongs, 1e308, "1" + strings.Repeat("0", 308) + " furlongs"},
		{"huge value, fixed decimals: no binary digits", chanOf(t, "lambda"), 1.2345678901234566e25, "12345678901234566000000000.000 λ"},
	}
	var f Formatter
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if got := f.Format(c.ch, c.v).String(); got != c.want {
				t.Errorf("%g → %q, want %q", c.v, got, c.want)
			}
		})
	}
}

// Value's parts: the number alone, the gauge flag, OK.
func TestValueParts(t *testing.T) {
	var f Formatter
	v := f.FormatAgainst(chanOf(t, "manifold_pressure"), 181325, 101325)
	if v.Text() != "181" || v.Gauge || !v.OK || v.Unit != "kPa" || v.Decimals != 0 || v.Number != 181 {
		t.Errorf("as measured: %+v", v)
	}
	g := f.WithUnits(Units{Boost: Gauge}).FormatAgainst(chanOf(t, "manifold_pressure"), 181325, 101325)
	if g.Text() != "80" || !g.Gauge || g.Number != 80 {
		t.Errorf("gauge: %+v", g)
	}
	n := f.Format(chanOf(t, "lambda"), math.NaN())
	if n.OK || n.Text() != NoNumber || n.Unit != "λ" || n.Decimals != 3 {
		t.Errorf("NaN: %+v", n)
	}
	if got := string(v.Append([]byte("map="))); got != "map=181 kPa" {
		t.Errorf("Append: %q", got)
	}
}

// The zero Formatter is the metric default with gasoline; New refuses an
// unknown fuel; WithUnits changes only the units.
func TestFormatter(t *testing.T) {
	var zero Formatter
	if zero.Fuel() != "gasoline" || zero.Stoich() != 14.7 || zero.Units() != (Units{}) {
		t.Errorf("zero Formatter: %s %g %+v", zero.Fuel(), zero.Stoich(), zero.Units())
	}
	if _, err := New(Config{Fuel: "kerosene"}); err == nil || !strings.Contains(err.Error(), "kerosene") {
		t.Errorf("New with an unknown fuel: %v", err)
	}
	for _, name := range derive.FuelNames() {
		f, err := New(Config{Fuel: name, Units: Units{Mixture: AFR}})
		if err != nil {
			t.Fatal(err)
		}
		fuel, _ := derive.LookupFuel(name)
		if f.Fuel() != name || f.Stoich() != fuel.Stoich {
			t.Errorf("%s: fuel %s stoich %g", name, f.Fuel(), f.Stoich())
		}
		g := f.WithUnits(Units{Power: HPMech})
		if g.Fuel() != name || g.Units().Power != HPMech || g.Units().Mixture != Lambda {
			t.Errorf("WithUnits: %s %+v", g.Fuel(), g.Units())
		}
	}
}

// ScaleOf is the affine conversion an axis needs; it agrees with Format.
func TestScaleOf(t *testing.T) {
	cases := []struct {
		channel, units string
		v, want        float64
		label          string
	}{
		{"corrected_power", "", 220749.64, 220.74964, "kW"},
		{"corrected_power", "power=hp_mech", 745.69987158227022, 1, "hp"},
		{"boost_pressure", "", 80000, 80, "kPa gauge"},
		{"boost_pressure", "boost=absolute", 80000, 80, "kPa gauge"}, // no reference on an axis
		{"manifold_pressure", "pressure=bar", 101325, 1.01325, "bar"},
		{"coolant_temp", "temperature=F", 100, 212, "°F"},
		{"lambda", "", 1, 1, "λ"},
		{"lambda", "mixture=afr", 1, 14.7, "AFR"},
		{"throttle_position", "", 0.5, 50, "%"},
		{"engine_speed", "", 6000, 6000, "rpm"},
		{"manifold_pressure_ratio", "", 2, 2, ""},
	}
	for _, c := range cases {
		f := Formatter{}.WithUnits(mustUnits(t, c.units))
		s := f.ScaleOf(chanOf(t, c.channel))
		if got := s.Apply(c.v); math.Abs(got-c.want) > 1e-9*math.Max(1, math.Abs(c.want)) {
			t.Errorf("%s %s: %g → %g, want %g", c.channel, c.units, c.v, got, c.want)
		}
		if s.Label() != c.label {
			t.Errorf("%s %s: label %q, want %q", c.channel, c.units, s.Label(), c.label)
		}
		if v := f.Format(chanOf(t, c.channel), c.v); math.Abs(v.Number-round(s.Apply(c.v), v.Decimals)) > 1e-9 {
			t.Errorf("%s: Format %g, ScaleOf %g", c.channel, v.Number, s.Apply(c.v))
		}
	}
}

// Every catalogued channel has a rule: none falls through to the canonical
// unit's name, and every one shows a number for a value in its range.
func TestEveryCatalogueChannelHasARule(t *testing.T) {
	var f Formatter
	for _, ch := range pipeline.Catalogue() {
		if strings.HasSuffix(ch.Name, "_") {
			ch.Name += "x"
		}
		v := f.Format(ch, (ch.Min+ch.Max)/2)
		if !v.OK {
			t.Errorf("%s: no number", ch.Name)
		}
		if ch.Unit != pipeline.None && v.Unit == strings.ReplaceAll(string(ch.Unit), "_", " ") && ch.Unit != pipeline.RPM {
			t.Errorf("%s: shown in the canonical unit's name %q: the quantity %q has no rule", ch.Name, v.Unit, ch.Quantity)
		}
	}
}

// sink keeps the benchmark's results alive.
var sink []byte

// Formatting one value must stay allocation-light: the console formats ten
// values a second per channel per browser.
func BenchmarkFormat(b *testing.B) {
	f, err := New(Config{Units: Units{Pressure: Bar, Boost: Gauge, Power: HPMech, Mixture: AFR}})
	if err != nil {
		b.Fatal(err)
	}
	chans := []pipeline.Channel{chanOf(b, "manifold_pressure"), chanOf(b, "lambda"), chanOf(b, "brake_power"), chanOf(b, "coolant_temp"), chanOf(b, "fuel_volume_flow")}
	vals := []float64{181325, 0.9998720000000001, 220749.64, 90.4, 3.4e-7}
	buf := make([]byte, 0, 64)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		k := i % len(chans)
		buf = f.FormatAgainst(chans[k], vals[k], 101325).Append(buf[:0])
	}
	sink = buf
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/value")
}

// Formatting into a reused buffer allocates nothing.
func TestFormatDoesNotAllocate(t *testing.T) {
	f := Formatter{}.WithUnits(Units{Pressure: PSI, Boost: Gauge, Temperature: Fahrenheit})
	ch := chanOf(t, "manifold_pressure")
	buf := make([]byte, 0, 64)
	if n := testing.AllocsPerRun(100, func() { buf = f.FormatAgainst(ch, 181325, 101325).Append(buf[:0]) }); n != 0 {
		t.Errorf("%g allocations per value, want 0", n)
	}
}

// A browser's override applies on top of the configured units.
func TestOverride(t *testing.T) {
	f, err := New(Config{Units: Units{Pressure: Bar, Temperature: Fahrenheit}, Fuel: "e85"})
	if err != nil {
		t.Fatal(err)
	}
	g, err := f.Override("pressure=psi,mixture=afr")
	if err != nil {
		t.Fatal(err)
	}
	if want := (Units{Pressure: PSI, Temperature: Fahrenheit, Mixture: AFR}); g.Units() != want || g.Fuel() != "e85" {
		t.Errorf("%+v %s, want %+v e85", g.Units(), g.Fuel(), want)
	}
	if got := g.Format(chanOf(t, "lambda"), 1).String(); got != "9.8 AFR" {
		t.Errorf("λ 1 with e85: %q", got)
	}
	h, err := f.Override("power=hp")
	if err == nil || h.Units() != f.Units() {
		t.Errorf("a refused override: %v, units %+v", err, h.Units())
	}
}
