package main

import (
	"bytes"
	"context"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/runs"
)

// checkHead is a configuration with a microcontroller that measures MAP,
// IAT and engine speed only.
const checkHead = `vehicle: x
engine: {displacement_l: 2, volumetric_efficiency: 0.9}
serial:
  - name: m
    device: /dev/x
    inputs:
      - {field: a0, channel: manifold_pressure, calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 300]}}}
      - {field: a1, channel: intake_air_temp, calibration: {unit: c, linear: {in_mv: [0, 5000], out: [-40, 150]}}}
      - {field: a2, channel: engine_speed, calibration: {unit: rpm, linear: {in_mv: [0, 5000], out: [0, 8000]}}}
`

func writeFile(t *testing.T, dir, name, text string) string {
	t.Helper()
	p := filepath.Join(dir, name)
	if err := os.WriteFile(p, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}

// TestCheckRefusesWhatRunWouldNotDo: each configuration here passed `check`
// before, and then `run` refused it or did something else than it says.
// check now exits 2 naming file:line and the field in a sentence.
func TestCheckRefusesWhatRunWouldNotDo(t *testing.T) {
	dir := t.TempDir()
	placeholder := writeFile(t, dir, "placeholder-token", "change-me-to-a-long-random-string\n")
	short := writeFile(t, dir, "short-token", "abc123\n")
	cases := []struct {
		name, yaml, want string
	}{
		{"a misspelt channel in a rule", checkHead + "warnings:\n  - {name: boost_limit, rule: \"boost_presure > 80000 for 1s severity critical\"}\n",
			`:11: warnings[0].rule: warning rule boost_limit reads "boost_presure", which is no channel Plenum knows (did you mean boost_pressure?); the rule could never be raised.`},
		{"a rule on a channel not measured", checkHead + "warnings:\n  - {name: hot_oil, rule: \"off\"}\n  - {name: very_hot_oil, rule: \"oil_temp > 140\"}\n",
			":12: warnings[1].rule: warning rule very_hot_oil reads oil_temp, which this setup neither measures nor derives"},
		{"a simulated bus without the simulator", checkHead + "can:\n  - {name: e, bus: sim, channels: [{name: ecu_engine_speed, rate_hz: 10}]}\n",
			":11: can[0].bus: the simulated bus needs the simulated engine"},
		{"a calibration range upside down", "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nserial:\n  - name: m\n    device: /dev/x\n    inputs:\n      - field: a0\n        channel: manifold_pressure\n        calibration: {unit: kpa, linear: {in_mv: [0, 5000], out: [0, 300]}, range: [300, 20]}\n",
			":9: serial[0].inputs[0].calibration: the calibration does not work"},
		{"the placeholder control token", checkHead + "record:\n  dir: " + dir + "\n  manual: true\n  control_token_file: " + placeholder + "\n",
			":13: record.control_token_file: " + placeholder + " holds the example's placeholder token"},
		{"a control token too short", checkHead + "record:\n  dir: " + dir + "\n  control_token_file: " + short + "\n",
			":12: record.control_token_file: " + short + " holds a token of 6 characters; a control token needs at least 16"},
		{"a negative cool-down time constant", checkHead + "turbo:\n  cool_down_tau: -60s\n",
			":11: turbo.cool_down_tau: is -1m0s, but a duration must not be negative."},
		{"one address for both listeners", checkHead + "mqtt: {listen: \"127.0.0.1:9108\"}\n",
			":10: mqtt.listen: is 127.0.0.1:9108, the address of the metrics listener (http.listen) too"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			f := writeFile(t, t.TempDir(), "bad.yaml", c.yaml)
			var out, errb bytes.Buffer
			if code := run([]string{"check", "-config", f}, &out, &errb); code != 2 {
				t.Fatalf("check exited %d, want 2\nstdout %s\nstderr %s", code, out.String(), errb.String())
			}
			if want := f + c.want; !strings.Contains(errb.String(), want) {
				t.Fatalf("stderr %q\nwant it to contain %q", errb.String(), want)
			}
			// run (Load, then runDaemon) refuses it the same way, before
			// opening anything.
			cfg, err := config.Load(f)
			if err == nil {
				cfg.StateDir = t.TempDir()
				err = runDaemon(context.Background(), cfg, io.Discard, slog.New(slog.DiscardHandler))
			}
			if err == nil || !strings.Contains(err.Error(), f+c.want) {
				t.Fatalf("run: %v\nwant it to contain %q", err, f+c.want)
			}
		})
	}
}

// TestCheckNamesLeftOutBuiltinRules: a built-in rule whose channels the
// setup lacks is left out with one info line naming it; the others are not
// named.
func TestCheckNamesLeftOutBuiltinRules(t *testing.T) {
	f := writeFile(t, t.TempDir(), "ok.yaml", checkHead)
	var out, errb bytes.Buffer
	if code := run([]string{"check", "-config", f}, &out, &errb); code != 0 {
		t.Fatalf("check exited %d: %s", code, errb.String())
	}
	for rule, n := range map[string]int{"hot_oil": 1, "hot_coolant": 1, "lean_under_boost": 1, "low_oil_pressure": 1, "over_boost": 0, "hot_intake_air": 0} {
		if got := strings.Count(errb.String(), "rule="+rule+" "); got != n {
			t.Errorf("%d info lines name %s, want %d:\n%s", got, rule, n, errb.String())
		}
	}
	if !strings.Contains(errb.String(), `level=INFO msg="built-in warning rule left out`) {
		t.Errorf("no info line:\n%s", errb.String())
	}
}

// TestProbeSimConfigurationChecksAndRuns: what `plenum probe -sim` prints
// is a whole configuration that check accepts and run starts, polling the
// simulated ECU.
func TestProbeSimConfigurationChecksAndRuns(t *testing.T) {
	var out, errb bytes.Buffer
	if code := run([]string{"probe", "-sim"}, &out, &errb); code != 0 {
		t.Fatalf("probe -sim exited %d: %s", code, errb.String())
	}
	s := out.String()
	i := strings.Index(s, "# A configuration to start from")
	if i < 0 {
		t.Fatalf("probe printed no configuration:\n%s", s)
	}
	f := writeFile(t, t.TempDir(), "probe.yaml", s[i:])
	out.Reset()
	errb.Reset()
	if code := run([]string{"check", "-config", f}, &out, &errb); code != 0 {
		t.Fatalf("check of probe's configuration exited %d: %s\n%s", code, errb.String(), s[i:])
	}
	cfg, err := config.Load(f)
	if err != nil {
		t.Fatal(err)
	}
	// Free ports and a state directory of its own; the rest as printed.
	cfg.HTTP.Listen, cfg.MQTT.Listen, cfg.StateDir = "127.0.0.1:0", "127.0.0.1:0", t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	logs := &syncBuffer{}
	done := make(chan error, 1)
	stdout := &syncBuffer{}
	go func() { done <- runDaemon(ctx, cfg, stdout, slog.New(slog.NewTextHandler(logs, nil))) }()
	// Started: it serves metrics in which the ECU's engine speed appears.
	deadline := time.Now().Add(20 * time.Second)
	for {
		if m := urlRE.FindStringSubmatch(stdout.String()); m != nil {
			fams, _ := scrape(t, m[1])
			if _, ok := gauge(fams, "plenum_engine_speed_rpm", "ecu_engine_speed"); ok {
				break
			}
		}
		select {
		case err := <-done:
			t.Fatalf("run of probe's configuration stopped: %v\n%s\n%s", err, stdout.String(), logs.String())
		case <-time.After(50 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			t.Fatalf("no ECU engine speed in the metrics:\n%s\n%s", stdout.String(), logs.String())
		}
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("run: %v", err)
	}
}

// TestAutoTriggerAlone: auto_trigger without manual starts no run with the
// daemon (the trigger starts them) instead of recording one long run in
// which the trigger can never start one.
func TestAutoTriggerAlone(t *testing.T) {
	cfg, err := config.Parse("auto.yaml", []byte(checkHead+"record: {dir: "+t.TempDir()+", auto_trigger: true}\n"))
	if err != nil {
		t.Fatal(err)
	}
	rc, err := cfg.Runs()
	if err != nil {
		t.Fatal(err)
	}
	if !rc.AutoTrigger {
		t.Fatal("auto trigger off")
	}
	reg := pipeline.NewRegistry()
	p := pipeline.New(reg, nil, pipeline.Options{})
	c := runs.New(rc, runs.Deps{Registry: reg, Sub: p.Subscribe("recorder", 16)})
	id, err := c.StartUnlessManual()
	if err != nil || id != "" || c.Current() != "" {
		t.Fatalf("a run %q started with the daemon (%v): the trigger could never start one", id, err)
	}
}

// TestControlTokenFromFile: the token is read from its file, trimmed.
func TestControlTokenFromFile(t *testing.T) {
	dir := t.TempDir()
	tok := writeFile(t, dir, "token", "  0123456789abcdef0123456789abcdef\n")
	cfg, err := config.Parse("tok.yaml", []byte(checkHead+"record: {dir: "+dir+", manual: true, control_token_file: "+tok+"}\n"))
	if err != nil {
		t.Fatal(err)
	}
	rc, err := cfg.Runs()
	if err != nil || rc.ControlToken != "0123456789abcdef0123456789abcdef" {
		t.Fatalf("token %q, %v", rc.ControlToken, err)
	}
}
