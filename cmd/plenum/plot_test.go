package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/plot"
	"github.com/plenum-engine/plenum/pipeline/replay"
)

// plotSVG runs plenum plot on the short run and returns the SVG.
func plotSVG(t *testing.T, args ...string) string {
	t.Helper()
	out := filepath.Join(t.TempDir(), "p.svg")
	var o, e bytes.Buffer
	if code := run(append([]string{"plot", "-in", "testdata/short-run.lp", "-out", out}, args...), &o, &e); code != 0 {
		t.Fatalf("plot %v exited %d: %s", args, code, e.String())
	}
	b, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// With the default units, the display-based axes draw the engine-speed
// panels exactly as the canonical-unit axes did (rpm, kW, N·m, kPa, λ).
func TestPlotDefaultUnitsUnchanged(t *testing.T) {
	input, err := replay.Resolve("../../testdata/golden-run", "") // the demo cycle, with pulls
	if err != nil {
		t.Fatal(err)
	}
	rec, err := input.ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	var before, after bytes.Buffer
	old := plot.Config{Unit: plot.CatalogueUnit}
	if _, err := plot.Write(&before, plot.SVG, old, []plot.Series{old.Align("run", rec)}); err != nil {
		t.Fatal(err)
	}
	var f display.Formatter
	now := plot.Config{Unit: plot.CatalogueUnit, Display: plot.DisplayScale(f)}
	if _, err := plot.Write(&after, plot.SVG, now, []plot.Series{now.Align("run", rec)}); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(before.Bytes(), after.Bytes()) {
		t.Error("the default display units changed the engine-speed panels")
	}
	for _, w := range []string{"engine speed (rpm)", "power (kW)", "torque (N·m)", "boost (kPa)", ">λ<", "run, pull 2"} {
		if !strings.Contains(after.String(), w) {
			t.Errorf("the SVG lacks %q", w)
		}
	}
}

// -units and -fuel choose the axes' units; panels against time are in the
// display units too, not in raw SI.
func TestPlotUnits(t *testing.T) {
	cases := []struct {
		args    []string
		want    []string
		wantNot []string
	}{
		{[]string{"-channels", "manifold_pressure,intake_air_temp,throttle_position"},
			[]string{"power (kW)", "boost (kPa)", "manifold_pressure (kPa)", "intake_air_temp (°C)", "throttle_position (%)"},
			[]string{"(pascals)", "(celsius)", "(ratio)"}},
		{[]string{"-units", "power=hp_mech,pressure=psi,temperature=F,torque=lbft,mixture=afr", "-fuel", "e85", "-channels", "manifold_pressure,intake_air_temp"},
			[]string{"power (hp)", "boost (psi)", "torque (lbf·ft)", "air-fuel ratio (AFR)", "manifold_pressure (psi)", "intake_air_temp (°F)"},
			[]string{"(kW)", "(kPa)", "(°C)"}},
		{[]string{"-units", "power=hp_metric,pressure=bar"}, []string{"power (PS)", "boost (bar)"}, []string{"(hp)"}},
	}
	for _, c := range cases {
		t.Run(strings.Join(c.args, " "), func(t *testing.T) {
			svg := plotSVG(t, c.args...)
			for _, w := range c.want {
				if !strings.Contains(svg, w) {
					t.Errorf("the SVG lacks %q", w)
				}
			}
			for _, w := range c.wantNot {
				if strings.Contains(svg, w) {
					t.Errorf("the SVG has %q", w)
				}
			}
		})
	}
}

// A bad -units item or -fuel is a usage error that names it.
func TestPlotUnitsRefused(t *testing.T) {
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"-units", "power=hp"}, `"power=hp" is refused: say which horsepower`},
		{[]string{"-units", "pressure=atm"}, `"pressure=atm"`},
		{[]string{"-fuel", "kerosene"}, `"kerosene"`},
	}
	for _, c := range cases {
		var o, e bytes.Buffer
		args := append([]string{"plot", "-in", "testdata/short-run.lp", "-out", filepath.Join(t.TempDir(), "p.svg")}, c.args...)
		if code := run(args, &o, &e); code != 2 || !strings.Contains(e.String(), c.want) {
			t.Errorf("%v: exit %d, %q; want 2 and %q", c.args, code, e.String(), c.want)
		}
	}
}
