package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/sim"
)

func TestCheckCommand(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte("vehicle: x\nengine:\n  displacement_l: 2\n  volumetric_efficiency: 0.9\n  boost_valve: 3\n"), 0o644)
	var out, errb bytes.Buffer
	if code := run([]string{"check", "-config", bad}, &out, &errb); code != 2 {
		t.Fatalf("check of a bad config exited %d, want 2 (stderr %q)", code, errb.String())
	}
	if want := bad + ":5: boost_valve: unknown key"; !strings.Contains(errb.String(), want) {
		t.Fatalf("stderr %q does not contain %q", errb.String(), want)
	}
	for _, good := range []string{"../../deploy/plenum.yaml", "../../deploy/delimited.yaml"} {
		out.Reset()
		errb.Reset()
		if code := run([]string{"check", "-config", good}, &out, &errb); code != 0 {
			t.Errorf("check %s exited %d: %s", good, code, errb.String())
		}
	}
	if code := run([]string{"check"}, &out, &errb); code != 2 {
		t.Errorf("check without -config exited %d, want 2", code)
	}
	if code := run([]string{"frobnicate"}, &out, &errb); code != 2 {
		t.Errorf("unknown command exited %d, want 2", code)
	}
}

func TestVersionCommand(t *testing.T) {
	var out, errb bytes.Buffer
	if code := run([]string{"version"}, &out, &errb); code != 0 || !strings.HasPrefix(out.String(), "plenum ") {
		t.Fatalf("version: %d %q", code, out.String())
	}
}

func TestEmbeddedDemoConfigMatchesSimulator(t *testing.T) {
	// The demo configuration is checked like any other, and maps every field
	// the simulated microcontroller sends.
	var out, errb bytes.Buffer
	f := filepath.Join(t.TempDir(), "demo.yaml")
	os.WriteFile(f, demoConfig, 0o644)
	if code := run([]string{"check", "-config", f}, &out, &errb); code != 0 {
		t.Fatalf("embedded demo config does not check: %s", errb.String())
	}
	cfg, err := config.Parse("demo.yaml", demoConfig)
	if err != nil {
		t.Fatal(err)
	}
	mapped := map[string]bool{}
	for _, in := range cfg.Serial[0].Inputs {
		mapped[in.Field] = true
	}
	for _, s := range sim.DemoSensors() {
		if !mapped[s.Field] {
			t.Errorf("the simulator sends %s but the demo config does not map it", s.Field)
		}
	}
}

func TestProbeSimulatedECU(t *testing.T) {
	var out, errb bytes.Buffer
	if code := run([]string{"probe", "-sim"}, &out, &errb); code != 0 {
		t.Fatalf("probe -sim exited %d: %s", code, errb.String())
	}
	s := out.String()
	for _, want := range []string{"7E8", sim.DemoVIN, "0C", "multi-PID", "- {name: ecu_engine_speed, rate_hz: 20}"} {
		if !strings.Contains(s, want) {
			t.Errorf("probe output lacks %q:\n%s", want, s)
		}
	}
	// The snippet it prints is a valid configuration section.
	snippet := s[strings.Index(s, "can:"):]
	cfg := "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nsimulator: {}\nserial: [{name: m, inputs: []}]\n" + snippet
	if _, err := config.Parse("snippet.yaml", []byte(cfg)); err != nil {
		t.Fatalf("probe's snippet does not check: %v\n%s", err, cfg)
	}
}
