package obd

import (
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/pipeline"
)

// Check values: formulas of SAE J1979 / ISO 15031-5 Service $01 as given in
// reference-facts §1.1 (cross-checked there against [WP-PIDs] and Scapy),
// worked by hand into canonical units. want lists every field expected; a
// field not listed must not be emitted (e.g. support bit clear).
var update = flag.Bool("update", false, "rewrite golden files")

var pidCases = []struct {
	pid  PID
	data []byte
	want map[string]float64
}{
	{0x01, []byte{0x83, 0x07, 0xE5, 0x00}, map[string]float64{"ecu_mil_on": 1, "ecu_dtc_count": 3}},
	{0x01, []byte{0x00, 0, 0, 0}, map[string]float64{"ecu_mil_on": 0, "ecu_dtc_count": 0}},
	{0x01, []byte{0xFF, 0, 0, 0}, map[string]float64{"ecu_mil_on": 1, "ecu_dtc_count": 127}},
	{0x04, []byte{0x00}, map[string]float64{"ecu_engine_load": 0}},
	{0x04, []byte{0xFF}, map[string]float64{"ecu_engine_load": 1}},
	{0x04, []byte{0x80}, map[string]float64{"ecu_engine_load": 128.0 / 255}},
	{0x05, []byte{0x00}, map[string]float64{"ecu_coolant_temperature": -40}},
	{0x05, []byte{0x28}, map[string]float64{"ecu_coolant_temperature": 0}},
	{0x05, []byte{0xFF}, map[string]float64{"ecu_coolant_temperature": 215}},
	{0x06, []byte{0x00}, map[string]float64{"ecu_short_fuel_trim_bank1": -1}},
	{0x07, []byte{0x80}, map[string]float64{"ecu_long_fuel_trim_bank1": 0}},
	{0x08, []byte{0xFF}, map[string]float64{"ecu_short_fuel_trim_bank2": 0.9921875}},
	{0x09, []byte{0x90}, map[string]float64{"ecu_long_fuel_trim_bank2": 0.125}},
	{0x0A, []byte{0xFF}, map[string]float64{"ecu_fuel_pressure": 765000}},
	{0x0A, []byte{0x00}, map[string]float64{"ecu_fuel_pressure": 0}},
	{0x0B, []byte{0x65}, map[string]float64{"ecu_manifold_pressure": 101000}},
	{0x0B, []byte{0xFF}, map[string]float64{"ecu_manifold_pressure": 255000}},
	{0x0C, []byte{0x1A, 0xF8}, map[string]float64{"ecu_engine_speed": 1726}},
	{0x0C, []byte{0xFF, 0xFF}, map[string]float64{"ecu_engine_speed": 16383.75}},
	{0x0C, []byte{0x00, 0x00}, map[string]float64{"ecu_engine_speed": 0}},
	{0x0D, []byte{0x64}, map[string]float64{"ecu_vehicle_speed": 27.777777777777778}},
	{0x0D, []byte{0xFF}, map[string]float64{"ecu_vehicle_speed": 70.83333333333333}},
	{0x0E, []byte{0x00}, map[string]float64{"ecu_timing_advance": -64}},
	{0x0E, []byte{0x80}, map[string]float64{"ecu_timing_advance": 0}},
	{0x0E, []byte{0xFF}, map[string]float64{"ecu_timing_advance": 63.5}},
	{0x0F, []byte{0x00}, map[string]float64{"ecu_intake_air_temperature": -40}},
	{0x0F, []byte{0xFF}, map[string]float64{"ecu_intake_air_temperature": 215}},
	{0x10, []byte{0x01, 0xF4}, map[string]float64{"ecu_mass_air_flow": 5}},
	{0x10, []byte{0xFF, 0xFF}, map[string]float64{"ecu_mass_air_flow": 655.35}},
	{0x11, []byte{0xFF}, map[string]float64{"ecu_throttle_position": 1}},
	{0x11, []byte{0x00}, map[string]float64{"ecu_throttle_position": 0}},
	{0x1F, []byte{0x0E, 0x10}, map[string]float64{"ecu_run_time": 3600}},
	{0x1F, []byte{0xFF, 0xFF}, map[string]float64{"ecu_run_time": 65535}},
	{0x22, []byte{0x00, 0x01}, map[string]float64{"ecu_fuel_rail_pressure_relative": 79}},
	{0x22, []byte{0xFF, 0xFF}, map[string]float64{"ecu_fuel_rail_pressure_relative": 5177265}},
	{0x23, []byte{0x00, 0x0A}, map[string]float64{"ecu_fuel_rail_gauge_pressure": 100000}},
	{0x23, []byte{0xFF, 0xFF}, map[string]float64{"ecu_fuel_rail_gauge_pressure": 655350000}},
	{0x24, []byte{0x80, 0x00, 0x80, 0x00}, map[string]float64{"ecu_o2_s1_lambda_v": 1, "ecu_o2_s1_voltage": 4}},
	{0x2B, []byte{0xFF, 0xFF, 0xFF, 0xFF}, map[string]float64{"ecu_o2_s8_lambda_v": 1.999969482421875, "ecu_o2_s8_voltage": 7.9998779296875}},
	{0x27, []byte{0, 0, 0, 0}, map[string]float64{"ecu_o2_s4_lambda_v": 0, "ecu_o2_s4_voltage": 0}},
	{0x2C, []byte{0xFF}, map[string]float64{"ecu_commanded_egr": 1}},
	{0x2D, []byte{0x00}, map[string]float64{"ecu_egr_error": -1}},
	{0x2D, []byte{0x80}, map[string]float64{"ecu_egr_error": 0}},
	{0x2E, []byte{0x00}, map[string]float64{"ecu_commanded_evap_purge": 0}},
	{0x2F, []byte{0xFF}, map[string]float64{"ecu_fuel_level": 1}},
	{0x32, []byte{0x80, 0x00}, map[string]float64{"ecu_evap_vapour_pressure": -8192}},
	{0x32, []byte{0x7F, 0xFF}, map[string]float64{"ecu_evap_vapour_pressure": 8191.75}},
	{0x32, []byte{0xFF, 0xFF}, map[string]float64{"ecu_evap_vapour_pressure": -0.25}},
	{0x33, []byte{0x64}, map[string]float64{"ecu_barometric_pressure": 100000}},
	// 34–3B current: reference-facts §10 item 1, test 80 00 → 0.0 mA.
	{0x34, []byte{0x80, 0x00, 0x80, 0x00}, map[string]float64{"ecu_o2_s1_lambda_i": 1, "ecu_o2_s1_current": 0}},
	{0x3B, []byte{0, 0, 0, 0}, map[string]float64{"ecu_o2_s8_lambda_i": 0, "ecu_o2_s8_current": -0.128}},
	{0x38, []byte{0xFF, 0xFF, 0xFF, 0xFF}, map[string]float64{"ecu_o2_s5_lambda_i": 1.999969482421875, "ecu_o2_s5_current": 0.00012799609375 * 1000}},
	{0x3C, []byte{0x00, 0x00}, map[string]float64{"ecu_catalyst_temperature_b1s1": -40}},
	{0x3D, []byte{0x01, 0x90}, map[string]float64{"ecu_catalyst_temperature_b2s1": 0}},
	{0x3E, []byte{0xFF, 0xFF}, map[string]float64{"ecu_catalyst_temperature_b1s2": 6513.5}},
	{0x3F, []byte{0x13, 0x88}, map[string]float64{"ecu_catalyst_temperature_b2s2": 460}},
	{0x42, []byte{0x30, 0xD4}, map[string]float64{"ecu_module_voltage": 12.5}},
	{0x42, []byte{0xFF, 0xFF}, map[string]float64{"ecu_module_voltage": 65.535}},
	{0x43, []byte{0x00, 0xFF}, map[string]float64{"ecu_absolute_load": 1}},
	{0x43, []byte{0xFF, 0xFF}, map[string]float64{"ecu_absolute_load": 257}},
	{0x44, []byte{0x80, 0x00}, map[string]float64{"ecu_commanded_lambda": 1}},
	{0x45, []byte{0xFF}, map[string]float64{"ecu_relative_throttle_position": 1}},
	{0x46, []byte{0x00}, map[string]float64{"ecu_ambient_air_temperature": -40}},
	{0x49, []byte{0xFF}, map[string]float64{"ecu_accelerator_pedal_d": 1}},
	{0x4A, []byte{0x00}, map[string]float64{"ecu_accelerator_pedal_e": 0}},
	{0x4B, []byte{0x33}, map[string]float64{"ecu_accelerator_pedal_f": 0.2}},
	{0x4C, []byte{0xFF}, map[string]float64{"ecu_commanded_throttle": 1}},
	{0x51, []byte{0x01}, map[string]float64{"ecu_fuel_type": 1}},
	{0x51, []byte{0x17}, map[string]float64{"ecu_fuel_type": 23}},
	{0x52, []byte{0xFF}, map[string]float64{"ecu_ethanol_fraction": 1}},
	{0x5C, []byte{0x00}, map[string]float64{"ecu_oil_temperature": -40}},
	{0x5C, []byte{0x8C}, map[string]float64{"ecu_oil_temperature": 100}},
	{0x5E, []byte{0x00, 0x14}, map[string]float64{"ecu_fuel_rate": 1e-3 / 3600}},
	{0x5E, []byte{0xFF, 0xFF}, map[string]float64{"ecu_fuel_rate": 3276.75e-3 / 3600}},
	{0x61, []byte{0x00}, map[string]float64{"ecu_demand_torque_fraction": -1.25}},
	{0x61, []byte{0x7D}, map[string]float64{"ecu_demand_torque_fraction": 0}},
	{0x62, []byte{0xFF}, map[string]float64{"ecu_actual_torque_fraction": 1.30}},
	{0x63, []byte{0xFF, 0xFF}, map[string]float64{"ecu_reference_torque": 65535}},
	{0x6F, []byte{0x03, 0x64, 0xFF}, map[string]float64{"ecu_compressor_inlet_pressure_a": 100000, "ecu_compressor_inlet_pressure_b": 255000}},
	{0x6F, []byte{0x01, 0x64, 0xFF}, map[string]float64{"ecu_compressor_inlet_pressure_a": 100000}},
	{0x6F, []byte{0x02, 0x64, 0xFF}, map[string]float64{"ecu_compressor_inlet_pressure_b": 255000}},
	{0x6F, []byte{0x00, 0x64, 0xFF}, map[string]float64{}},
	{0x70, []byte{0x0F, 0x0C, 0x80, 0xFF, 0xFF, 0x00, 0x00, 0x00, 0x20, 0x00}, map[string]float64{
		"ecu_boost_commanded_a": 100000, "ecu_boost_pressure_a": 2047968.75, "ecu_boost_commanded_b": 0, "ecu_boost_pressure_b": 1000}},
	{0x70, []byte{0x05, 0x0C, 0x80, 0xFF, 0xFF, 0x00, 0x00, 0x12, 0x34, 0xFF}, map[string]float64{
		"ecu_boost_commanded_a": 100000, "ecu_boost_commanded_b": 0}},
	{0x73, []byte{0x03, 0x27, 0x10, 0xFF, 0xFF}, map[string]float64{"ecu_exhaust_pressure_b1": 100000, "ecu_exhaust_pressure_b2": 655350}},
	{0x73, []byte{0x02, 0x27, 0x10, 0x00, 0x00}, map[string]float64{"ecu_exhaust_pressure_b2": 0}},
	// 0x74 at 10 rpm/bit, the documented choice (reference-facts §10 item 2).
	{0x74, []byte{0x03, 0x00, 0x01, 0xFF, 0xFF}, map[string]float64{"ecu_turbo_speed_a": 10, "ecu_turbo_speed_b": 655350}},
	{0x74, []byte{0x01, 0x4E, 0x20, 0xFF, 0xFF}, map[string]float64{"ecu_turbo_speed_a": 200000}},
	{0x75, []byte{0x0F, 0x28, 0xFF, 0x01, 0x90, 0xFF, 0xFF}, map[string]float64{
		"ecu_turbo_a_compressor_inlet_temperature": 0, "ecu_turbo_a_compressor_outlet_temperature": 215,
		"ecu_turbo_a_turbine_inlet_temperature": 0, "ecu_turbo_a_turbine_outlet_temperature": 6513.5}},
	{0x76, []byte{0x04, 0x28, 0xFF, 0x00, 0x00, 0xFF, 0xFF}, map[string]float64{"ecu_turbo_b_turbine_inlet_temperature": -40}},
	{0x77, []byte{0x0F, 0x00, 0x28, 0x50, 0xFF}, map[string]float64{
		"ecu_charge_cooler_temperature_b1s1": -40, "ecu_charge_cooler_temperature_b1s2": 0,
		"ecu_charge_cooler_temperature_b2s1": 40, "ecu_charge_cooler_temperature_b2s2": 215}},
	{0x78, []byte{0x0F, 0x01, 0x90, 0xFF, 0xFF, 0x00, 0x00, 0x13, 0x88}, map[string]float64{
		"ecu_exhaust_gas_temperature_b1s1": 0, "ecu_exhaust_gas_temperature_b1s2": 6513.5,
		"ecu_exhaust_gas_temperature_b1s3": -40, "ecu_exhaust_gas_temperature_b1s4": 460}},
	{0x79, []byte{0x0A, 0x01, 0x90, 0xFF, 0xFF, 0x00, 0x00, 0x13, 0x88}, map[string]float64{
		"ecu_exhaust_gas_temperature_b2s2": 6513.5, "ecu_exhaust_gas_temperature_b2s4": 460}},
	{0x87, []byte{0x03, 0x0C, 0x80, 0xFF, 0xFF}, map[string]float64{"ecu_manifold_pressure_wide_a": 100000, "ecu_manifold_pressure_wide_b": 2047968.75}},
	{0x87, []byte{0x00, 0x0C, 0x80, 0xFF, 0xFF}, map[string]float64{}},
}

func approx(a, b float64) bool {
	return math.Abs(a-b) <= 1e-9*math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
}

func TestDecodePIDTable(t *testing.T) {
	for _, c := range pidCases {
		got := map[string]float64{}
		err := DecodePID(c.pid, c.data, func(pid PID, ch ChannelIndex, v float64) {
			def, p, ok := StandardChannel(ch)
			if !ok || p != pid || pid != c.pid {
				t.Errorf("PID 0x%02X: channel %d belongs to PID 0x%02X", c.pid, ch, p)
			}
			if _, dup := got[def.Name]; dup {
				t.Errorf("PID 0x%02X: %s emitted twice", c.pid, def.Name)
			}
			got[def.Name] = v
		})
		if err != nil {
			t.Errorf("PID 0x%02X % X: %v", c.pid, c.data, err)
			continue
		}
		for n, w := range c.want {
			if g, ok := got[n]; !ok || !approx(g, w) {
				t.Errorf("PID 0x%02X % X: %s = %v (present %v), want %v", c.pid, c.data, n, g, ok, w)
			}
		}
		for n := range got {
			if _, ok := c.want[n]; !ok {
				t.Errorf("PID 0x%02X % X: unexpected field %s", c.pid, c.data, n)
			}
		}
	}
}

// TestTableCoversRequiredPIDs: every PID of the brief is decodable, with its
// J1979 data length, and has a check case above.
func TestTableCoversRequiredPIDs(t *testing.T) {
	lengths := map[PID]int{0x01: 4, 0x04: 1, 0x05: 1, 0x0A: 1, 0x0B: 1, 0x0C: 2, 0x0D: 1, 0x0E: 1, 0x0F: 1, 0x10: 2, 0x11: 1,
		0x1F: 2, 0x22: 2, 0x23: 2, 0x2C: 1, 0x2D: 1, 0x2E: 1, 0x2F: 1, 0x32: 2, 0x33: 1, 0x42: 2, 0x43: 2, 0x44: 2, 0x45: 1,
		0x46: 1, 0x51: 1, 0x52: 1, 0x5C: 1, 0x5E: 2, 0x61: 1, 0x62: 1, 0x63: 2, 0x6F: 3, 0x70: 10, 0x73: 5, 0x74: 5, 0x75: 7,
		0x76: 7, 0x77: 5, 0x78: 9, 0x79: 9, 0x87: 5}
	for p := PID(0x06); p <= 0x09; p++ {
		lengths[p] = 1
	}
	for p := PID(0x24); p <= 0x2B; p++ {
		lengths[p], lengths[p+0x10] = 4, 4
	}
	for p := PID(0x3C); p <= 0x3F; p++ {
		lengths[p] = 2
	}
	for p := PID(0x49); p <= 0x4C; p++ {
		lengths[p] = 1
	}
	tested := map[PID]bool{}
	for _, c := range pidCases {
		tested[c.pid] = true
	}
	for p, n := range lengths {
		if got, ok := PIDLength(p); !ok || got != n {
			t.Errorf("PID 0x%02X: length %d known %v, want %d", p, got, ok, n)
		}
		if !tested[p] && !(p >= 0x25 && p <= 0x2A) && !(p >= 0x35 && p <= 0x3A) { // those: TestO2SensorsAll
			t.Errorf("PID 0x%02X has no check value", p)
		}
	}
	for p := 0; p < 256; p++ {
		if _, ok := lengths[PID(p)]; !ok && KnownPID(PID(p)) && !IsBitmapPID(PID(p)) {
			t.Errorf("PID 0x%02X decoded but not in the required list", p)
		}
	}
}

// TestO2SensorsAll: every O2 PID maps to its own sensor number.
func TestO2SensorsAll(t *testing.T) {
	for i := 0; i < 8; i++ {
		for _, base := range []PID{0x24, 0x34} {
			var names []string
			_ = DecodePID(base+PID(i), []byte{0x80, 0, 0x80, 0}, func(_ PID, ch ChannelIndex, _ float64) {
				c, _, _ := StandardChannel(ch)
				names = append(names, c.Name)
			})
			want := "ecu_o2_s" + string(rune('1'+i)) + "_"
			if len(names) != 2 || !strings.HasPrefix(names[0], want) || !strings.HasPrefix(names[1], want) {
				t.Errorf("PID 0x%02X: channels %v, want prefix %s", base+PID(i), names, want)
			}
		}
	}
}

func TestChannelDefinitions(t *testing.T) {
	canonical := map[pipeline.Unit]bool{pipeline.Pascal: true, pipeline.Celsius: true, pipeline.GramsPerSec: true,
		pipeline.Seconds: true, pipeline.Ratio: true, pipeline.Volts: true, pipeline.Amperes: true, pipeline.RPM: true,
		pipeline.MetresPerSecond: true, pipeline.NewtonMetres: true, pipeline.Degrees: true, pipeline.CubicMetresPerS: true,
		pipeline.Count: true, pipeline.None: true}
	names := map[string]bool{}
	reg := pipeline.NewRegistry()
	for i := ChannelIndex(0); i < NumStandardChannels(); i++ {
		c, pid, ok := StandardChannel(i)
		if !ok {
			t.Fatalf("channel %d missing", i)
		}
		if err := c.Validate(); err != nil {
			t.Errorf("channel %d: %v", i, err)
		}
		if !strings.HasPrefix(c.Name, "ecu_") || names[c.Name] {
			t.Errorf("channel %q: want unique ecu_ name", c.Name)
		}
		names[c.Name] = true
		if !canonical[c.Unit] {
			t.Errorf("channel %q: unit %q not canonical", c.Name, c.Unit)
		}
		if _, err := reg.Register(c); err != nil {
			t.Errorf("register %q: %v", c.Name, err)
		}
		if j, p, ok := LookupChannel(c.Name); !ok || j != i || p != pid {
			t.Errorf("LookupChannel(%q) = %d, 0x%02X", c.Name, j, p)
		}
		if c.Min >= c.Max {
			t.Errorf("channel %q: range %v–%v", c.Name, c.Min, c.Max)
		}
	}
	if _, _, ok := StandardChannel(NumStandardChannels()); ok {
		t.Error("StandardChannel beyond the table reports ok")
	}
	// Spot-check ranges against reference-facts §1.1 "Range" column.
	for name, r := range map[string][2]float64{"ecu_engine_speed": {0, 16383.75}, "ecu_coolant_temperature": {-40, 215},
		"ecu_evap_vapour_pressure": {-8192, 8191.75}, "ecu_timing_advance": {-64, 63.5}, "ecu_dtc_count": {0, 127}} {
		i, _, _ := LookupChannel(name)
		c, _, _ := StandardChannel(i)
		if !approx(c.Min, r[0]) || !approx(c.Max, r[1]) {
			t.Errorf("%s range %v–%v, want %v–%v", name, c.Min, c.Max, r[0], r[1])
		}
	}
}

func TestDecodePIDErrors(t *testing.T) {
	nop := func(PID, ChannelIndex, float64) {}
	if err := DecodePID(0x0C, []byte{1}, nop); err == nil || !strings.Contains(err.Error(), "0x0C") {
		t.Errorf("short data: %v", err)
	}
	if err := DecodePID(0x0C, []byte{1, 2, 3}, nop); err == nil {
		t.Error("long data accepted")
	}
	if err := DecodePID(0x02, []byte{1, 2}, nop); err == nil || !strings.Contains(err.Error(), "not in the decode table") {
		t.Errorf("unknown PID: %v", err)
	}
}

// TestChannelsGolden pins the standard channel list (name, unit, PID, range)
// to testdata/channels.golden; run with -update after a deliberate change.
func TestChannelsGolden(t *testing.T) {
	var b strings.Builder
	for i := ChannelIndex(0); i < NumStandardChannels(); i++ {
		c, pid, _ := StandardChannel(i)
		fmt.Fprintf(&b, "%3d 0x%02X %-45s %-24s %g .. %g\n", i, uint8(pid), c.Name, c.Unit, c.Min, c.Max)
	}
	path := filepath.Join("testdata", "channels.golden")
	if *update {
		if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if string(want) != b.String() {
		t.Errorf("channel table differs from %s (run go test -run ChannelsGolden -update):\n%s", path, b.String())
	}
}

// Every channel of the decode table has its entry in the channel catalogue
// (which gives its quantity, unit and description), as an OBD channel whose
// range is what the encoding can carry.
func TestChannelsCatalogued(t *testing.T) {
	for i := ChannelIndex(0); i < NumStandardChannels(); i++ {
		s := std.chans[i]
		c, ok := pipeline.Catalogued(s.name)
		if !ok || c.Origin != pipeline.FromOBD {
			t.Errorf("%s: not catalogued as an OBD channel (%+v)", s.name, c)
			continue
		}
		if c.Min != s.min || c.Max != s.max {
			t.Errorf("%s: catalogue range %g…%g, the encoding carries %g…%g", s.name, c.Min, c.Max, s.min, s.max)
		}
		if got, _, _ := StandardChannel(i); got.Unit != c.Unit || got.Source != "obd" {
			t.Errorf("%s: StandardChannel %+v", s.name, got)
		}
	}
}
