package config

import (
	"math"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/pipeline"
)

func TestLoadGood(t *testing.T) {
	cfg, err := Load("testdata/good.yaml")
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Vehicle != "brackenfell-rs" || len(cfg.Serial) != 1 || len(cfg.Serial[0].Inputs) != 2 {
		t.Fatalf("decoded %+v", cfg)
	}
	if cfg.Serial[0].Baud != 115200 || cfg.MQTT.Prefix != "plenum" {
		t.Fatalf("defaults not applied: %+v", cfg.Serial[0])
	}
}

func TestErrorsNameFileLineAndField(t *testing.T) {
	cases := []struct {
		name, yaml, want string
	}{
		{"unknown key", "vehicle: x\nengine:\n  displacement_l: 2\n  volumetric_efficiency: 0.9\n  turbo_size: 3\n",
			"bad.yaml:5: turbo_size: unknown key in engine"},
		{"negative displacement", "vehicle: x\nengine:\n  displacement_l: -2\n  volumetric_efficiency: 0.9\n",
			"bad.yaml:3: engine.displacement_l: must be between 0 and 20 litres"},
		{"bad fuel", "vehicle: x\nengine:\n  displacement_l: 2\n  volumetric_efficiency: 0.9\n  fuel: kerosene\n",
			`bad.yaml:5: engine.fuel: unknown fuel "kerosene"`},
		{"wrong type", "vehicle: x\nengine:\n  displacement_l: two\n",
			"bad.yaml:3: cannot unmarshal"},
		{"unknown channel", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nserial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: boost_thing\n        calibration: {linear: {in_mv: [0, 5000], out: [0, 1]}}\n",
			`bad.yaml:8: serial[0].inputs[0].channel: unknown channel "boost_thing"`},
		{"unit mismatch", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nserial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: manifold_pressure\n        calibration:\n          unit: c\n          linear: {in_mv: [0, 5000], out: [0, 1]}\n",
			`bad.yaml:10: serial[0].inputs[0].calibration.unit: unit "c" does not measure pascals`},
		{"non-monotonic table", "vehicle: x\nengine:\n  displacement_l: 2\n  ve_table:\n    engine_speeds_rpm: [1000, 900]\n    manifold_pressures_kpa: [30, 100]\n    values: [[0.5, 0.6], [0.7, 0.8]]\n",
			"bad.yaml:5: engine.ve_table.engine_speeds_rpm[1]: must increase strictly"},
		{"missing vehicle", "engine: {displacement_l: 2, volumetric_efficiency: 0.9}\n", "bad.yaml:1: vehicle: must name"},
		{"commands without a command user", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord: {dir: /tmp/r}\nmqtt:\n  users:\n    - {name: wall, password_file: /etc/pw}\n  commands: true\n",
			"bad.yaml:7: mqtt.commands: no user may send them"},
		{"commands on an external broker without a token", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord: {dir: /tmp/r}\nmqtt:\n  broker: tcp://10.0.0.2:1883\n  commands: true\n",
			"bad.yaml:6: mqtt.commands: with an external broker, commands need record.control_token"},
		{"commands without recording", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nmqtt:\n  users: [{name: op, password_file: /etc/pw, commands: true}]\n  commands: true\n",
			"bad.yaml:5: mqtt.commands: run commands need record.dir"},
		{"user without password file", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nmqtt:\n  users:\n    - name: op\n",
			"mqtt.users[0].password_file: needs a file"},
		{"push without precision", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  dir: /tmp/r\n  push:\n    url: http://db:8086/write?db=plenum\n",
			"bad.yaml:6: record.push.url: needs precision=ns"},
		{"push without recording", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  push:\n    url: http://db:8086/write?db=plenum&precision=ns\n",
			"record.push: pushing needs record.dir"},
		{"negative free-space guard", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  dir: /tmp/r\n  min_free_mb: -1\n",
			"bad.yaml:5: record.min_free_mb: must be between 0"},
		{"bad broker", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nmqtt:\n  broker: http://x\n", "bad.yaml:4: mqtt.broker"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := Parse("bad.yaml", []byte(c.yaml))
			if err == nil || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("err = %v\nwant it to contain %q", err, c.want)
			}
		})
	}
}

func TestToCanonical(t *testing.T) {
	cases := []struct {
		unit string
		to   pipeline.Unit
		in   float64
		want float64
	}{
		{"kpa", pipeline.Pascal, 101.325, 101325},
		{"psi", pipeline.Pascal, 14.696, 101325}, // NIST SP 811: 1 psi = 6.894757 kPa; 14.696 psi = 1 atm
		{"f", pipeline.Celsius, 212, 100},        // water boils at 212 °F = 100 °C (definition of the scales)
		{"k", pipeline.Celsius, 273.15, 0},
		{"percent", pipeline.Ratio, 50, 0.5},
	}
	for _, c := range cases {
		got, err := ToCanonical(c.unit, c.to, c.in)
		if err != nil || math.Abs(got-c.want) > 0.5 {
			t.Errorf("%g %s = %g (%v), want %g", c.in, c.unit, got, err, c.want)
		}
	}
}

func FuzzParse(f *testing.F) {
	for _, s := range []string{"vehicle: x\n", "engine: {displacement_l: 2}\n", "serial: [{name: a, inputs: [{field: a0}]}]\n", "::\n", "vehicle: [\n"} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		cfg, err := Parse("fuzz.yaml", data)
		if err == nil && cfg == nil {
			t.Fatal("nil config without error")
		}
		if err != nil && !strings.HasPrefix(err.Error(), "fuzz.yaml") {
			t.Fatalf("error does not name the file: %v", err)
		}
	})
}

// TestEveryKnownFuelAccepted checks that the config accepts each fuel derive
// knows (propane among them), in the fuel named by the config.
func TestEveryKnownFuelAccepted(t *testing.T) {
	cases := []string{"gasoline", "diesel", "e85", "e100", "methanol", "propane", "lpg", "cng"}
	for _, fuel := range cases {
		t.Run(fuel, func(t *testing.T) {
			cfg, err := Parse("fuel.yaml", []byte("vehicle: x\nengine:\n  displacement_l: 2\n  volumetric_efficiency: 0.9\n  fuel: "+fuel+"\n"))
			if err != nil {
				t.Fatalf("fuel %s refused: %v", fuel, err)
			}
			if cfg.Engine.Fuel != fuel {
				t.Errorf("engine.fuel = %q, want %q", cfg.Engine.Fuel, fuel)
			}
		})
	}
}
