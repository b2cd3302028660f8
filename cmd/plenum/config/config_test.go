package config

import (
	"log/slog"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
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
		{"unknown compression", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  dir: /tmp/r\n  compress: zstd\n",
			`bad.yaml:5: record.compress: is "zstd"; it takes gzip (the default) or off`},
		{"negative retention size", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  dir: /tmp/r\n  retain: {max_total_mb: -5}\n",
			"bad.yaml:5: record.retain.max_total_mb: must be between 0"},
		{"negative retention age", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  dir: /tmp/r\n  retain:\n    max_age_days: -1\n",
			"bad.yaml:6: record.retain.max_age_days: must be between 0"},
		{"retention without recording", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  retain: {max_age_days: 30}\n",
			"record.retain: retention needs record.dir"},
		{"bad broker", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nmqtt:\n  broker: http://x\n", "bad.yaml:4: mqtt.broker"},
		{"display: which horsepower", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\ndisplay:\n  pressure: bar\n  power: hp\n",
			"bad.yaml:5: display.power: say which horsepower, hp_mech"},
		{"display: unknown pressure unit", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\ndisplay: {pressure: atm}\n",
			`bad.yaml:3: display.pressure: "atm" is not a pressure unit this layer offers; choose kPa, bar, psi.`},
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

// TestRefusedButAcceptedBefore lists configurations that check used to pass
// although the daemon then did something else than they say: each is now
// refused with file:line, the field and a complete sentence.
func TestRefusedButAcceptedBefore(t *testing.T) {
	const head = "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\n"
	const mcu = "serial:\n  - name: m\n    device: /dev/x\n    inputs:\n" +
		"      - {field: a0, channel: manifold_pressure, calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 300]}}}\n"
	cases := []struct {
		name, yaml, want string
	}{
		{"two serial inputs on one channel", head + mcu +
			"      - {field: a1, channel: manifold_pressure, calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 300]}}}\n",
			"bad.yaml:8: serial[0].inputs[1].channel: channel manifold_pressure is already written by serial[0].inputs[0].channel (line 7)"},
		{"two serial sources on one channel", head + mcu +
			"  - name: n\n    device: /dev/y\n    inputs:\n      - {field: a0, channel: manifold_pressure, calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 300]}}}\n",
			"bad.yaml:11: serial[1].inputs[0].channel: channel manifold_pressure is already written"},
		{"two CAN sections on one channel", head +
			"can:\n  - {name: a, bus: can0, channels: [{name: ecu_engine_speed, rate_hz: 10}]}\n  - {name: b, bus: can1, channels: [{name: ecu_engine_speed, rate_hz: 10}]}\n",
			"bad.yaml:5: can[1].channels[0].name: channel ecu_engine_speed is already written"},
		{"NaN volumetric efficiency", "vehicle: x\nengine:\n  displacement_l: 2\n  volumetric_efficiency: .nan\n",
			"bad.yaml:4: engine.volumetric_efficiency: is NaN, but it must be a finite number."},
		{"NaN barometric pressure", "vehicle: x\nengine:\n  displacement_l: 2\n  volumetric_efficiency: 0.9\n  baro_kpa: .nan\n",
			"bad.yaml:5: engine.baro_kpa: is NaN, but it must be a finite number."},
		{"infinite displacement", "vehicle: x\nengine:\n  displacement_l: .inf\n  volumetric_efficiency: 0.9\n",
			"bad.yaml:3: engine.displacement_l: is +Inf, but it must be a finite number."},
		{"NaN in a calibration", head + "serial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: manifold_pressure\n        calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, .nan]}}\n",
			"bad.yaml:9: serial[0].inputs[0].calibration.linear.out[1]: is NaN"},
		{"NaN poll rate", head + "can:\n  - name: e\n    bus: can0\n    channels:\n      - {name: ecu_engine_speed, rate_hz: .nan}\n",
			"bad.yaml:7: can[0].channels[0].rate_hz: is NaN"},
		{"negative sync_every", head + "record:\n  dir: /tmp/r\n  sync_every: -1s\n",
			"bad.yaml:5: record.sync_every: is -1s, but a duration must not be negative."},
		{"negative rotate_mb", head + "record:\n  dir: /tmp/r\n  rotate_mb: -4\n",
			"bad.yaml:5: record.rotate_mb: must not be negative"},
		{"negative snapshot_every", head + "mqtt:\n  snapshot_every: -5s\n",
			"bad.yaml:4: mqtt.snapshot_every: is -5s, but a duration must not be negative."},
		{"negative cool_down_tau", head + "turbo:\n  cool_down_tau: -60s\n",
			"bad.yaml:4: turbo.cool_down_tau: is -1m0s, but a duration must not be negative."},
		{"negative max_age", head + "serial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: manifold_pressure\n        max_age: -1s\n        calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 300]}}\n",
			"bad.yaml:9: serial[0].inputs[0].max_age: is -1s"},
		{"negative filter drop", head + "turbo:\n  filter_drop_kpa: -2\n",
			"bad.yaml:4: turbo.filter_drop_kpa: must not be negative"},
		{"one address for both listeners", head + "mqtt:\n  listen: 127.0.0.1:9000\nhttp:\n  listen: 127.0.0.1:9000\n",
			"bad.yaml:6: http.listen: is 127.0.0.1:9000, the address of the embedded broker (mqtt.listen) too"},
		{"a wildcard and a loopback listener on one port", head + "mqtt:\n  listen: :9000\nhttp:\n  listen: localhost:9000\n",
			"bad.yaml:6: http.listen: is localhost:9000, the address of the embedded broker"},
		{"the old control_token key", head + "record:\n  dir: /tmp/r\n  control_token: change-me-to-a-long-random-string\n",
			"bad.yaml:5: record.control_token: is no longer read: a secret in the configuration would be copied into every recorded run. Put the token in a file readable only by the daemon and name it in record.control_token_file."},
		{"a token without recording", head + "record:\n  control_token_file: /etc/plenum/control-token\n",
			"bad.yaml:4: record.control_token_file: run commands need record.dir"},
		{"a unit of another quantity names what fits", head + "serial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: throttle_position\n        calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 1]}}\n",
			`bad.yaml:9: serial[0].inputs[0].calibration.unit: unit "kpa" does not measure ratio (it measures pascals): channel throttle_position takes one of "percent", "ratio", "" (the channel's own unit).`},
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

// TestMessagesAreSentences checks that every refusal ends as a sentence and
// none ends mid-phrase (as `unit "kpa" does not measure ` once did).
func TestMessagesAreSentences(t *testing.T) {
	bad := []string{
		"vehicle: x\nengine:\n  displacement_l: 2\n  volumetric_efficiency: 0.9\n  turbo_size: 3\n",
		"vehicle: x\nengine: {displacement_l: -2, volumetric_efficiency: 0.9, fuel: kerosene}\n",
		"vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nserial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: lambda_error\n        calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 1]}}\n",
		"vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nserial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: wideband_voltage\n        calibration: {unit: furlongs, linear: {in_mv: [0, 5000], out: [0, 1]}}\n",
		"vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nwarnings:\n  - {name: x, rule: 'oil_temp >'}\n",
		"vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\ndisplay: {power: hp, mixture: phi}\n",
		"",
	}
	for _, y := range bad {
		_, err := Parse("bad.yaml", []byte(y))
		if err == nil {
			t.Fatalf("accepted:\n%s", y)
		}
		for _, line := range strings.Split(err.Error(), "\n") {
			if !strings.HasSuffix(line, ".") || strings.HasSuffix(line, " .") {
				t.Errorf("not a complete sentence: %q", line)
			}
		}
	}
}

// The display section gives the units people read; absent, the metric
// defaults.
func TestDisplayUnits(t *testing.T) {
	cases := []struct {
		yaml string
		want display.Units
	}{
		{"", display.Units{}},
		{"display: {pressure: bar, boost: gauge, temperature: F, power: hp_metric, torque: lbft, mass_flow: kg/h, mixture: AFR, speed: mph, volume_flow: gal/h}\n",
			display.Units{Pressure: display.Bar, Boost: display.Gauge, Temperature: display.Fahrenheit, Power: display.HPMetric, Torque: display.PoundFoot,
				MassFlow: display.KilogramsPerHour, Mixture: display.AFR, Speed: display.MPH, VolumeFlow: display.GallonsPerHour}},
		{"display:\n  power: hp_mech\n", display.Units{Power: display.HPMech}},
	}
	for _, c := range cases {
		cfg, err := Parse("good.yaml", []byte("vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\n"+c.yaml))
		if err != nil {
			t.Fatal(err)
		}
		u, err := cfg.Display.Units()
		if err != nil || u != c.want {
			t.Errorf("%q: %+v, %v; want %+v", c.yaml, u, err, c.want)
		}
	}
}

func TestRetentionAndCompressorConvert(t *testing.T) {
	base := "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nrecord:\n  dir: /tmp/r\n"
	cases := []struct {
		name, yaml string
		keep       bool
		total      int64
		age        time.Duration
		minFree    int64
		pushed     bool
		compress   bool
	}{
		{"defaults: compress, keep everything", base, false, 0, 0, 0, false, true},
		{"limits", base + "  retain: {max_total_mb: 100, max_age_days: 1.5}\n  min_free_mb: 512\n", true, 100 << 20, 36 * time.Hour, 512 << 20, false, true},
		{"age alone, default guard", base + "  retain: {max_age_days: 30}\n", true, 0, 30 * 24 * time.Hour, 256 << 20, false, true},
		{"with push: unpushed runs kept", base + "  retain: {max_total_mb: 1}\n  push: {url: 'http://db:8086/write?db=p&precision=ns'}\nstate_dir: /tmp/s\n", true, 1 << 20, 0, 256 << 20, true, true},
		{"compress off", base + "  compress: off\n", false, 0, 0, 0, false, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg, err := Parse("t.yaml", []byte(c.yaml))
			if err != nil {
				t.Fatal(err)
			}
			log := slog.New(slog.DiscardHandler)
			rc, ok := cfg.Retention(log)
			if ok != c.keep || rc.Policy.MaxTotalBytes != c.total || rc.Policy.MaxAge != c.age ||
				rc.MinFreeBytes != c.minFree || rc.Policy.NeedPushed != c.pushed {
				t.Errorf("retention %v %+v", ok, rc.Policy)
			}
			if ok && (rc.Dir != "/tmp/r" || rc.DiskSpace == nil) {
				t.Errorf("retention dir %q, disk space set %v", rc.Dir, rc.DiskSpace != nil)
			}
			cc, ok := cfg.Compressor(log)
			if ok != c.compress || (ok && cc.Dir != "/tmp/r") {
				t.Errorf("compressor %v %+v", ok, cc)
			}
		})
	}
}
