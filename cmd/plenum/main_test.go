package main

import (
	"bytes"
	"os"
	"path/filepath"
	"regexp"
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
	for _, good := range []string{"../../deploy/plenum.yaml", "../../deploy/delimited.yaml", "../../deploy/firmware/plenum-mcu.yaml"} {
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

// TestDemoStartsFresh: the demo keeps no state in the user's cache
// directory (where `run` keeps it by default): it starts cold from a fresh
// temporary directory, unless -state-dir names one to keep.
func TestDemoStartsFresh(t *testing.T) {
	cache := t.TempDir()
	t.Setenv("XDG_CACHE_HOME", cache)
	t.Setenv("HOME", cache)
	demo := func(extra ...string) string {
		t.Helper()
		var out, errb bytes.Buffer
		args := append([]string{"demo", "-for", "1500ms", "-http", "127.0.0.1:0", "-mqtt", "127.0.0.1:0"}, extra...)
		if code := run(args, &out, &errb); code != 0 {
			t.Fatalf("demo %v: exit %d: %s", extra, code, errb.String())
		}
		return out.String()
	}
	out := demo()
	if entries, _ := os.ReadDir(cache); len(entries) != 0 {
		t.Errorf("the demo wrote into the user's cache directory: %v", entries)
	}
	m := regexp.MustCompile(`state: +(\S+)`).FindStringSubmatch(out)
	if m == nil {
		t.Fatalf("the demo does not say where its state is:\n%s", out)
	}
	if _, err := os.Stat(m[1]); !os.IsNotExist(err) {
		t.Errorf("the demo's temporary state %s outlived it (%v)", m[1], err)
	}
	keep := filepath.Join(t.TempDir(), "state")
	out = demo("-state-dir", keep)
	if !strings.Contains(out, "state:    "+keep) {
		t.Errorf("-state-dir not used:\n%s", out)
	}
	if f, _ := filepath.Glob(filepath.Join(keep, "turbo-*.json")); len(f) != 1 {
		t.Errorf("no turbo state kept in %s: %v", keep, f)
	}
}
