package plot

import (
	"bytes"
	"image/png"
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
