package derived

import (
	"errors"
	"math"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/pipeline"
)

var t0 = time.Date(2026, 5, 1, 12, 0, 0, 0, time.UTC)

// demoChannels are the channels of the demo's serial microcontroller.
var demoChannels = []string{
	"manifold_pressure", "intake_air_temp", "coolant_temp", "oil_temp", "wideband_voltage", "throttle_position",
	"oil_pressure", "baro_pressure", "exhaust_temp", "charge_temp_pre_cooler", "compressor_outlet_pressure",
	"ambient_temp", "ambient_humidity", "dyno_torque", "engine_speed",
}

// demoConfig is the demo engine's configuration, converted.
func demoConfig() Config {
	return Config{
		Displacement: 1.998e-3, Fuel: "gasoline", VE: 0.9, Baro: 100800,
		Wideband:      derive.Wideband{VoltsLow: 0, LambdaLow: 0.68, VoltsHigh: 5, LambdaHigh: 1.36},
		PowerStandard: "sae_j1349",
		Turbo:         Turbo{CoolDownTau: 15 * time.Second},
	}
}

// ecuChannels are channels the OBD decode table defines (not standard ones).
var ecuChannels = map[string]pipeline.Channel{
	"ecu_mass_air_flow":    {Name: "ecu_mass_air_flow", Quantity: "mass_flow", Unit: pipeline.GramsPerSec},
	"ecu_commanded_lambda": {Name: "ecu_commanded_lambda", Quantity: "lambda", Unit: pipeline.Ratio},
}

// registry registers the standard (or ECU) channels named, with an hour's
// maximum age so that tests can step time freely.
func registry(t testing.TB, names ...string) *pipeline.Registry {
	t.Helper()
	reg := pipeline.NewRegistry()
	for _, n := range names {
		ch, ok := pipeline.Standard(n)
		if !ok {
			ch, ok = ecuChannels[n]
		}
		if !ok {
			t.Fatalf("no channel %q", n)
		}
		ch.Source, ch.MaxAge = "test", time.Hour
		if _, err := reg.Register(ch); err != nil {
			t.Fatal(err)
		}
	}
	return reg
}

func names(ds []pipeline.Derivation) []string {
	var out []string
	for _, d := range ds {
		out = append(out, d.Name())
	}
	return out
}

func find(t testing.TB, s *Set, name string) pipeline.Derivation {
	t.Helper()
	for _, d := range s.Derivations {
		if d.Name() == name {
			return d
		}
	}
	t.Fatalf("no derivation %q in %v", name, names(s.Derivations))
	return nil
}

func outputNames(d pipeline.Derivation) []string {
	var out []string
	for _, c := range d.Outputs() {
		out = append(out, c.Name)
	}
	return out
}

func TestBuildChoosesByChannels(t *testing.T) {
	ecu := []string{"ecu_mass_air_flow", "manifold_pressure", "intake_air_temp", "engine_speed", "wideband_voltage", "ecu_commanded_lambda"}
	cases := []struct {
		name     string
		channels []string
		cfg      func(*Config)
		want     []string
		veTable  bool
		guard    bool
	}{
		{name: "nothing", want: nil},
		{name: "manifold pressure only", channels: []string{"manifold_pressure"}, want: []string{"boost", "warnings"}},
		{name: "engine speed only", channels: []string{"engine_speed"}, want: []string{"turbo_guard", "warnings"}, guard: true},
		{name: "demo", channels: demoChannels, guard: true, want: []string{"speed_density", "boost", "mixture", "fuel_flow",
			"compressor_ratio", "power", "charge_air", "turbo_lag", "turbo_guard", "warnings"}},
		{name: "demo without a wideband", channels: demoChannels, cfg: func(c *Config) { c.Wideband = derive.Wideband{} }, guard: true,
			want: []string{"speed_density", "boost", "compressor_ratio", "power", "charge_air", "turbo_lag", "turbo_guard", "warnings"}},
		{name: "every rule off", channels: []string{"engine_speed"}, guard: true, want: []string{"turbo_guard"},
			cfg: func(c *Config) {
				for _, r := range warn.Builtin() {
					c.Warnings = append(c.Warnings, warn.Text{Name: r.Name, Rule: warn.Off})
				}
			}},
		{name: "ECU", channels: ecu, veTable: true, guard: true,
			want: []string{"speed_density", "boost", "mixture", "fuel_flow", "ve_estimate", "lambda_error", "turbo_guard", "warnings"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := demoConfig()
			if c.cfg != nil {
				c.cfg(&cfg)
			}
			reg := registry(t, c.channels...)
			s, err := Build(cfg, reg)
			if err != nil {
				t.Fatal(err)
			}
			if got := names(s.Derivations); !reflect.DeepEqual(got, c.want) {
				t.Errorf("derivations %v, want %v", got, c.want)
			}
			if got := s.VETableHandler() != nil; got != c.veTable {
				t.Errorf("VE table handler: %v, want %v", got, c.veTable)
			}
			if got := s.guard != nil; got != c.guard {
				t.Errorf("turbo guard: %v, want %v", got, c.guard)
			}
			// What Build chose, the graph accepts: every input exists.
			if _, err := pipeline.BuildGraph(reg, s.Derivations); err != nil {
				t.Errorf("graph: %v", err)
			}
		})
	}
}

func TestWarningRules(t *testing.T) {
	all := []string{"warning_lean_under_boost", "warning_over_boost", "warning_hot_intake_air", "warning_hot_oil", "warning_hot_coolant",
		"warning_low_oil_pressure", "warning_cold_engine_high_load", "warning_switched_off_hot"}
	cases := []struct {
		name    string
		rules   []warn.Text
		lenient bool
		want    []string
	}{
		{"built-ins", nil, false, all},
		{"one off", []warn.Text{{Name: "hot_oil", Rule: warn.Off}}, false,
			[]string{"warning_lean_under_boost", "warning_over_boost", "warning_hot_intake_air", "warning_hot_coolant",
				"warning_low_oil_pressure", "warning_cold_engine_high_load", "warning_switched_off_hot"}},
		{"one replaced in place", []warn.Text{{Name: "over_boost", Rule: "boost_pressure > 150000 clear 140000"}}, false, all},
		{"one added", []warn.Text{{Name: "hot_exhaust", Rule: "exhaust_temp > 950 clear 900 for 1s"}}, false, append(all[:len(all):len(all)], "warning_hot_exhaust")},
		// Replay leaves out a configured rule whose channel the recording
		// lacks; the daemon refuses it (TestConfiguredRuleOnAbsentChannel).
		{"on a missing channel: left out in replay", []warn.Text{{Name: "low_fuel_pressure", Rule: "fuel_pressure < 250000"}}, true, all},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := demoConfig()
			cfg.Warnings = c.rules
			cfg.LenientRules = c.lenient
			s, err := Build(cfg, registry(t, demoChannels...))
			if err != nil {
				t.Fatal(err)
			}
			if got := outputNames(find(t, s, "warnings")); !reflect.DeepEqual(got, c.want) {
				t.Errorf("outputs %v, want %v", got, c.want)
			}
		})
	}
}

// TestConfiguredRuleOnAbsentChannel: a configured rule that reads a channel
// the setup lacks is refused, naming the rule, its index and the channel
// (with the nearest name for a misspelt one), where the daemon once dropped
// it silently; a built-in rule on absent channels is left out and listed.
func TestConfiguredRuleOnAbsentChannel(t *testing.T) {
	cases := []struct {
		name  string
		rules []warn.Text
		want  RuleChannelError
		msg   string
	}{
		{"misspelt", []warn.Text{{Name: "hot_oil", Rule: warn.Off}, {Name: "typo", Rule: "boost_presure > 80000 for 1s severity critical"}},
			RuleChannelError{Index: 1, Rule: "typo", Channel: "boost_presure", Suggest: "boost_pressure"},
			`warning rule typo reads "boost_presure", which is no channel Plenum knows (did you mean boost_pressure?); the rule could never be raised.`},
		{"known but not measured", []warn.Text{{Name: "hot_gearbox", Rule: "gear > 6"}},
			RuleChannelError{Index: 0, Rule: "hot_gearbox", Channel: "gear", Known: true},
			"warning rule hot_gearbox reads gear, which this setup neither measures nor derives"},
		{"a built-in replaced on an absent channel", []warn.Text{{Name: "over_boost", Rule: "gear > 6 and boost_pressure > 1"}},
			RuleChannelError{Index: 0, Rule: "over_boost", Channel: "gear", Known: true}, "over_boost reads gear"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if _, ok := pipeline.Catalogued(c.want.Channel); ok != c.want.Known {
				t.Fatalf("test premise: %s catalogued = %v", c.want.Channel, ok)
			}
			cfg := demoConfig()
			cfg.Warnings = c.rules
			_, err := Build(cfg, registry(t, demoChannels...))
			var rce *RuleChannelError
			if !errors.As(err, &rce) {
				t.Fatalf("err = %v, want a *RuleChannelError", err)
			}
			if *rce != c.want {
				t.Errorf("err = %+v, want %+v", *rce, c.want)
			}
			if !strings.Contains(err.Error(), c.msg) {
				t.Errorf("message %q, want it to contain %q", err.Error(), c.msg)
			}
		})
	}
	t.Run("built-ins on absent channels are listed", func(t *testing.T) {
		s, err := Build(demoConfig(), registry(t, "manifold_pressure", "intake_air_temp", "engine_speed"))
		if err != nil {
			t.Fatal(err)
		}
		want := []LeftOut{
			{Rule: "lean_under_boost", Missing: []string{"lambda"}},
			{Rule: "hot_oil", Missing: []string{"oil_temp"}},
			{Rule: "hot_coolant", Missing: []string{"coolant_temp"}},
			{Rule: "low_oil_pressure", Missing: []string{"oil_pressure"}},
		}
		if !reflect.DeepEqual(s.LeftOut, want) {
			t.Errorf("left out %+v, want %+v", s.LeftOut, want)
		}
	})
}

func TestBuildErrors(t *testing.T) {
	cases := []struct {
		name string
		cfg  func(*Config)
		want string
	}{
		{"unknown fuel", func(c *Config) { c.Fuel = "kerosene" }, "fuel"},
		{"unknown power standard", func(c *Config) { c.PowerStandard = "bogus" }, "power standard"},
		{"VE table out of order", func(c *Config) {
			c.VETable = &derive.VETable{Speeds: []float64{2000, 1000}, Pressures: []float64{30000, 100000}, Values: [][]float64{{0.5, 0.6}, {0.7, 0.8}}}
		}, "ve table"},
		{"bad rule", func(c *Config) { c.Warnings = []warn.Text{{Name: "x", Rule: "oil_temp >"}} }, "warning x"},
		{"bad lag target", func(c *Config) { c.Turbo.TargetBoost = math.Inf(1) }, "turbo lag"},
		{"bad cool-down tau", func(c *Config) { c.Turbo.CoolDownTau = -time.Second }, "turbo cool-down"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := demoConfig()
			c.cfg(&cfg)
			_, err := Build(cfg, registry(t, demoChannels...))
			if err == nil || !strings.Contains(err.Error(), c.want) {
				t.Errorf("err = %v, want it to contain %q", err, c.want)
			}
		})
	}
}

// TestZeroConfigDefaults checks the defaults of a zero Config: gasoline,
// SAE J1349 and the standard atmosphere.
func TestZeroConfigDefaults(t *testing.T) {
	s, err := Build(Config{}, registry(t, demoChannels...))
	if err != nil {
		t.Fatal(err)
	}
	if got := find(t, s, "power").Outputs()[1].Sensor; got != "corrected_sae_j1349" {
		t.Errorf("corrected power sensor %q", got)
	}
	out := make([]float64, 2)
	find(t, s, "boost").Derive(t0, []float64{derive.StdPressure + 50000, math.NaN()}, out)
	if out[0] != 50000 {
		t.Errorf("boost %g over the standard atmosphere, want 50000", out[0])
	}
	cfg := Config{Wideband: demoConfig().Wideband}
	s, err = Build(cfg, registry(t, demoChannels...))
	if err != nil {
		t.Fatal(err)
	}
	find(t, s, "mixture").Derive(t0, []float64{2.5}, out) // λ 1.02
	if want := derive.AFR(out[0], 14.7); out[1] != want {
		t.Errorf("AFR %g, want %g (gasoline)", out[1], want)
	}
}

// TestDerive checks each adapter's wiring: which input goes where, the
// fallbacks for missing optional inputs, units and the written mask.
func TestDerive(t *testing.T) {
	nan := math.NaN()
	cfg := demoConfig()
	cfg.Turbo.FilterDrop = 2000
	s, err := Build(cfg, registry(t, append(demoChannels, "compressor_inlet_pressure", "ecu_mass_air_flow", "ecu_commanded_lambda")...))
	if err != nil {
		t.Fatal(err)
	}
	gasoline, _ := derive.LookupFuel("gasoline")
	wb := cfg.Wideband
	airKgS := derive.SpeedDensity(150000, 30, 4000, 1.998e-3, 0.9)
	p := derive.PowerFromTorque(300, 4000)
	cf := func(a derive.Ambient) float64 {
		f, err := derive.SAEJ1349.Factor(a)
		if err != nil {
			t.Fatal(err)
		}
		return f
	}
	cases := []struct {
		name, deriv string
		in          []float64
		want        []float64 // NaN: not written
		mask        uint64
	}{
		{"speed density", "speed_density", []float64{150000, 30, 4000}, []float64{airKgS * 1000, 0.9}, 0b11},
		{"boost from the baro channel", "boost", []float64{150000, 99000}, []float64{51000, 150000.0 / 99000}, 0b11},
		{"boost from the configured baro", "boost", []float64{150000, nan}, []float64{49200, 150000.0 / 100800}, 0b11},
		{"mixture", "mixture", []float64{2.5}, []float64{wb.Lambda(2.5), derive.AFR(wb.Lambda(2.5), 14.7)}, 0b11},
		{"fuel flow", "fuel_flow", []float64{100, 0.8},
			[]float64{derive.FuelMassFlow(100, 0.8, 14.7), derive.FuelVolumeFlow(derive.FuelMassFlow(100, 0.8, 14.7)/1000, gasoline.Density)}, 0b11},
		{"compressor ratio over the inlet", "compressor_ratio", []float64{180000, 95000, 100000}, []float64{180000.0 / 95000}, 1},
		{"compressor ratio over baro", "compressor_ratio", []float64{180000, nan, 100000}, []float64{1.8}, 1},
		{"compressor ratio over the configured baro", "compressor_ratio", []float64{180000, nan, nan}, []float64{180000.0 / 100800}, 1},
		{"lambda error", "lambda_error", []float64{0.9, 0.85}, []float64{0.9 - 0.85}, 1},
		{"power without fuel flow", "power", []float64{300, 4000, 99000, 30, 0.5, nan},
			[]float64{p, p * cf(derive.Ambient{Pressure: 99000, Temperature: 30, Humidity: 0.5}), cf(derive.Ambient{Pressure: 99000, Temperature: 30, Humidity: 0.5}), nan}, 0b111},
		{"power on configured ambient, with BSFC", "power", []float64{300, 4000, nan, nan, nan, 8},
			[]float64{p, p * cf(derive.Ambient{Pressure: 100800, Temperature: 25}), cf(derive.Ambient{Pressure: 100800, Temperature: 25}), derive.BSFC(0.008, p) * 1000}, 0b1111},
		{"charge air, all", "charge_air", []float64{200000, 110, 20, 97000, 100000, 40, 150},
			[]float64{derive.CompressorEfficiency(20, 110, 200000/97000.0), derive.StandardDay().CorrectedMassFlow(150, 97000, 20), derive.IntercoolerEffectiveness(110, 40, 20)}, 0b111},
		{"charge air, inlet from baro less the filter", "charge_air", []float64{200000, 110, 20, nan, 100000, nan, nan},
			[]float64{derive.CompressorEfficiency(20, 110, 200000/98000.0), nan, nan}, 0b001},
		{"charge air, no pressure rise", "charge_air", []float64{105000, 30, 20, nan, nan, 25, nan},
			[]float64{nan, nan, derive.IntercoolerEffectiveness(30, 25, 20)}, 0b100},
		{"measured VE below 500 rpm", "ve_estimate", []float64{10, 100000, 20, 400}, []float64{nan}, 0},
		{"measured VE", "ve_estimate", []float64{airKgS * 1000, 150000, 30, 4000}, []float64{derive.MeasuredVE(airKgS, 150000, 30, 4000, 1.998e-3)}, 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			d := find(t, s, c.deriv)
			if len(c.in) != len(d.Inputs()) || len(c.want) != len(d.Outputs()) {
				t.Fatalf("case has %d inputs and %d outputs, derivation %d and %d", len(c.in), len(c.want), len(d.Inputs()), len(d.Outputs()))
			}
			out := make([]float64, len(c.want))
			for i := range out {
				out[i] = nan
			}
			if mask := d.Derive(t0, c.in, out); mask != c.mask {
				t.Errorf("mask %b, want %b", mask, c.mask)
			}
			for i, w := range c.want {
				if math.IsNaN(w) {
					continue
				}
				if math.Abs(out[i]-w) > 1e-12*math.Max(1, math.Abs(w)) {
					t.Errorf("%s = %v, want %v", d.Outputs()[i].Name, out[i], w)
				}
			}
		})
	}
}

// TestEnteredConditionsCorrectPower: conditions entered for a run win over
// the ambient channels in the power correction, field by field, until they
// are withdrawn.
//
// SAE J1349 (JUN1990 and later, spark ignition): CF = 1.18·(99/p_d)·
// √((T+273)/298) − 0.18, p_d dry-air pressure in kPa, T in °C. Worked by
// hand for the entered 98.2 kPa, 21.5 °C, dry air (p_d = 98.2 kPa):
//
//	99/98.2            = 1.0081466
//	(21.5+273)/298     = 0.9882550, √ = 0.9941102
//	1.18·1.0081466·0.9941102 = 1.1826064
//	CF = 1.1826064 − 0.18 = 1.0026064
//
// With only the temperature entered and the sensor's 100 kPa dry:
// 1.18·0.99·0.9941102 − 0.18 = 0.9813195; with the sensors alone (100 kPa,
// 30 °C, dry): 1.18·0.99·√(303/298) − 0.18 = 0.9979596.
func TestEnteredConditionsCorrectPower(t *testing.T) {
	s, err := Build(demoConfig(), registry(t, demoChannels...))
	if err != nil {
		t.Fatal(err)
	}
	d := find(t, s, "power")
	nan := math.NaN()
	// dyno torque 200 N·m at 3000 rpm; sensors: 100 kPa, 30 °C, dry.
	in := []float64{200, 3000, 100000, 30, 0, nan}
	out := make([]float64, len(d.Outputs()))
	observed := derive.PowerFromTorque(200, 3000)
	cases := []struct {
		name    string
		entered *derive.Ambient
		wantCF  float64
	}{
		{"sensors", nil, 0.9979596},
		{"entered", &derive.Ambient{Pressure: 98200, Temperature: 21.5, Humidity: 0}, 1.0026064},
		{"temperature entered", &derive.Ambient{Pressure: nan, Temperature: 21.5, Humidity: nan}, 0.9813195},
		{"withdrawn", nil, 0.9979596},
	}
	for _, c := range cases {
		if std := s.EnterConditions(c.entered); std != "sae_j1349" {
			t.Fatalf("%s: standard %q", c.name, std)
		}
		d.Derive(at(0), in, out)
		if math.Abs(out[2]-c.wantCF) > 5e-7 || math.Abs(out[1]-observed*c.wantCF) > 0.01 {
			t.Errorf("%s: correction factor %.7f, corrected %.3f W; want %.7f, %.3f W", c.name, out[2], out[1], c.wantCF, observed*c.wantCF)
		}
	}
	// Without a dyno there is no power to correct.
	s2, err := Build(demoConfig(), registry(t, "engine_speed", "baro_pressure"))
	if err != nil {
		t.Fatal(err)
	}
	if std := s2.EnterConditions(&derive.Ambient{Pressure: 98200}); std != "" {
		t.Errorf("no power derived, yet standard %q", std)
	}
}
