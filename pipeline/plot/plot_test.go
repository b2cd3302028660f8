package plot

import (
	"bytes"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// goldenRun is the demo cycle recorded by the daemon (see cmd/plenum's
// TestGoldenRun).
const goldenRun = "../../testdata/golden-run"

func readGolden(t *testing.T) record.Recording {
	t.Helper()
	files, err := filepath.Glob(filepath.Join(goldenRun, "*.lp.gz"))
	if err != nil || len(files) == 0 {
		t.Fatalf("golden run files: %v %v", files, err)
	}
	rec, err := record.ReadAll(files)
	if err != nil {
		t.Fatal(err)
	}
	return rec
}

// The golden run's two pulls become two lines per engine-speed panel, each
// sorted by engine speed and spanning the sweep.
func TestPlotSeparatesPulls(t *testing.T) {
	s := Config{}.Align("golden", readGolden(t))
	for _, ch := range []string{"corrected_power", "dyno_torque", "boost_pressure", "lambda"} {
		ps := s.pulls[ch]
		if len(ps) != 2 {
			t.Fatalf("%s: %d pulls, want 2", ch, len(ps))
		}
		for k, v := range ps {
			lo, hi := v[0][0], v[len(v)-1][0]
			if lo > 2500 || hi < 6000 {
				t.Errorf("%s pull %d spans %g–%g rpm", ch, k+1, lo, hi)
			}
			for i := 1; i < len(v); i++ {
				if v[i][0] < v[i-1][0] {
					t.Fatalf("%s pull %d not sorted by engine speed", ch, k+1)
				}
			}
		}
	}
}

// testUnits names units the way the channel catalogue does.
func testUnits(ch string) string {
	return map[string]string{"engine_speed": "rpm", "corrected_power": "watts", "dyno_torque": "newton meters",
		"boost_pressure": "pascals", "lambda": "ratio", "manifold_pressure": "pascals", "turbo_thermal_state": "celsius"}[ch]
}

// Every axis label takes its unit from Config.Unit; the engine-speed panels
// show watts and pascals scaled to kW and kPa.
func TestAxisLabels(t *testing.T) {
	rec := readGolden(t)
	cases := []struct {
		name    string
		unit    func(string) string
		want    []string
		wantNot []string
	}{
		{"catalogue units", testUnits,
			[]string{"engine speed (rpm)", "power (kW)", "torque (N·m)", "boost (kPa)", ">λ<", "manifold_pressure (pascals)", "turbo_thermal_state (celsius)", "lambda (ratio)"},
			[]string{"λ (ratio)", "boost (pascals)", "power (watts)"}},
		{"no units known", nil,
			[]string{">engine speed<", ">power<", ">torque<", ">boost<", ">manifold_pressure<", ">turbo_thermal_state<"},
			[]string{"(rpm)", "(kW)", "(kPa)", "(pascals)"}},
		{"a unit the panels do not scale", func(ch string) string { return "furlongs" },
			[]string{"engine speed (furlongs)", "power (furlongs)", "lambda (furlongs)"}, []string{"(kW)"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := Config{Channels: []string{"manifold_pressure", "turbo_thermal_state", "lambda"}, Unit: c.unit}
			var b bytes.Buffer
			n, err := Write(&b, SVG, cfg, []Series{cfg.Align("golden", rec)})
			if err != nil {
				t.Fatal(err)
			}
			if n != 7 {
				t.Errorf("%d panels, want 4 + 3", n)
			}
			svg := b.String()
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

func TestSave(t *testing.T) {
	rec := readGolden(t)
	dir := t.TempDir()
	cfg := Config{Channels: []string{"engine_speed"}, Unit: testUnits}
	runs := []Series{cfg.Align("first", rec), cfg.Align("second", rec)}
	cases := []struct {
		name    string
		wantErr string
	}{
		{"a.png", ""},
		{"a.SVG", ""},
		{"a.gif", "must end in .png or .svg"},
		{"no/such/dir.png", "no such file"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			path := filepath.Join(dir, c.name)
			n, err := Save(path, cfg, runs)
			if c.wantErr != "" {
				if err == nil || !strings.Contains(err.Error(), c.wantErr) {
					t.Fatalf("err = %v, want %q", err, c.wantErr)
				}
				return
			}
			if err != nil || n != 5 {
				t.Fatalf("Save: %d panels, %v", n, err)
			}
			b, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			if f, _ := FormatOf(path); f == PNG {
				img, err := png.Decode(bytes.NewReader(b))
				if err != nil || img.Bounds().Dx() < 500 {
					t.Fatalf("png: %v", err)
				}
			} else if !bytes.Contains(b, []byte("<svg")) || !bytes.Contains(b, []byte("second, pull 2")) {
				t.Fatal("the SVG lacks the frame or the second run's second pull")
			}
		})
	}
	if _, err := Write(new(bytes.Buffer), "gif", cfg, runs); err == nil {
		t.Fatal("Write in an unknown format succeeded")
	}
}

// testDisplay shows a few channels as a person who chose hp, psi, bar, °F
// and AFR would read them; the others it does not know.
func testDisplay(ch string) (Scale, bool) {
	s, ok := map[string]Scale{
		"engine_speed":        {Unit: "rpm", Factor: 1},
		"corrected_power":     {Unit: "hp", Factor: 1 / 745.69987158227022},
		"boost_pressure":      {Unit: "psi", Factor: 1 / 6894.757293168361},
		"lambda":              {Unit: "AFR", Factor: 14.7},
		"manifold_pressure":   {Unit: "bar", Factor: 1e-5},
		"turbo_thermal_state": {Unit: "°F", Factor: 1.8, Offset: 32},
	}[ch]
	return s, ok
}

// With Display, every panel takes its unit and its scaling from it; a
// channel it does not know falls back to Unit.
func TestDisplayScalesEveryPanel(t *testing.T) {
	rec := readGolden(t)
	chans := []string{"manifold_pressure", "turbo_thermal_state", "lambda"}
	base := Config{Channels: chans, Unit: testUnits}
	shown := Config{Channels: chans, Unit: testUnits, Display: testDisplay}
	var b bytes.Buffer
	if _, err := Write(&b, SVG, shown, []Series{shown.Align("golden", rec)}); err != nil {
		t.Fatal(err)
	}
	svg := b.String()
	for _, w := range []string{"engine speed (rpm)", "power (hp)", "torque (N·m)", "boost (psi)", "air-fuel ratio (AFR)",
		"manifold_pressure (bar)", "turbo_thermal_state (°F)", "lambda (AFR)"} {
		if !strings.Contains(svg, w) {
			t.Errorf("the SVG lacks %q", w)
		}
	}
	for _, w := range []string{"(kW)", "(kPa)", "(pascals)", "(celsius)"} {
		if strings.Contains(svg, w) {
			t.Errorf("the SVG has %q", w)
		}
	}
	want, err := build(base, []Series{base.Align("golden", rec)})
	if err != nil {
		t.Fatal(err)
	}
	got, err := build(shown, []Series{shown.Align("golden", rec)})
	if err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		panel int
		conv  func(float64) float64 // from the base plot's values to Display's
	}{
		{0, func(kW float64) float64 { return kW * 1000 / 745.69987158227022 }},
		{1, func(nm float64) float64 { return nm }}, // torque: not in Display
		{2, func(kPa float64) float64 { return kPa * 1000 / 6894.757293168361 }},
		{3, func(l float64) float64 { return l * 14.7 }},
		{4, func(pa float64) float64 { return pa * 1e-5 }},
		{5, func(c float64) float64 { return c*1.8 + 32 }},
	}
	for _, c := range cases {
		w, g := want[c.panel], got[c.panel]
		for _, r := range [][2]float64{{c.conv(w.Y.Min), g.Y.Min}, {c.conv(w.Y.Max), g.Y.Max}} {
			if math.Abs(r[0]-r[1]) > 1e-9*math.Max(1, math.Abs(r[0])) {
				t.Errorf("panel %q: y range %g–%g, want %g–%g", g.Title.Text, g.Y.Min, g.Y.Max, c.conv(w.Y.Min), c.conv(w.Y.Max))
			}
		}
		if w.Y.Max == w.Y.Min {
			t.Errorf("panel %q has no data", g.Title.Text)
		}
		if g.X.Min != w.X.Min || g.X.Max != w.X.Max {
			t.Errorf("panel %q: x range changed", g.Title.Text)
		}
	}
}
