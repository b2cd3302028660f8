package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// plenum sheet draws the golden run: both pulls, their peaks on stdout and
// in the SVG, in the units asked for.
func TestSheetGoldenRun(t *testing.T) {
	out := filepath.Join(t.TempDir(), "s.svg")
	var o, e bytes.Buffer
	args := []string{"sheet", "-in", "../../testdata/golden-run", "-out", out, "-units", "power=hp_mech,torque=lbft", "-channels", "boost_pressure,engine_speed"}
	if code := run(args, &o, &e); code != 0 {
		t.Fatalf("exit %d: %s", code, e.String())
	}
	b, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	for _, w := range []string{"· pull 1", "· pull 2", "hp @ 6600 rpm", "lbf·ft @", "time since tip-in (s)", "brackenfell-rs"} {
		if !strings.Contains(string(b), w) {
			t.Errorf("the SVG lacks %q", w)
		}
		if !strings.Contains(o.String()+string(b), w) {
			t.Errorf("the output lacks %q", w)
		}
	}
	if !strings.Contains(o.String(), "pull 2: ") || !strings.Contains(o.String(), "(raw ") {
		t.Errorf("stdout lacks the peaks: %q", o.String())
	}
}

// -channels with a name the catalogue lacks, or one no pull recorded, exits
// 2 with a sentence naming it, and writes no file.
func TestSheetUnknownChannel(t *testing.T) {
	cases := []struct{ channels, want string }{
		{"boost_pressure,warp_drive", `sheet: channel "warp_drive" is not in the channel catalogue`},
		{"ecu_fuel_pressure", `channel "ecu_fuel_pressure" was not recorded during any pull`},
	}
	for _, c := range cases {
		out := filepath.Join(t.TempDir(), "s.svg")
		var o, e bytes.Buffer
		code := run([]string{"sheet", "-in", "../../testdata/golden-run", "-out", out, "-channels", c.channels}, &o, &e)
		if code != 2 || !strings.Contains(e.String(), c.want) || !strings.HasSuffix(strings.TrimSpace(e.String()), ".") {
			t.Errorf("-channels %s: exit %d, %q; want 2 and %q", c.channels, code, e.String(), c.want)
		}
		if _, err := os.Stat(out); err == nil {
			t.Errorf("-channels %s: the sheet was written", c.channels)
		}
	}
}
