package main

import (
	"bytes"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// valueOf finds the last recorded value of a channel in replay output.
func valueOf(t *testing.T, out, channel string) float64 {
	t.Helper()
	v := math.NaN()
	for _, line := range strings.Split(out, "\n") {
		if !strings.HasPrefix(line, "plenum,channel="+channel+",") {
			continue
		}
		f := strings.SplitN(line, " value=", 2)
		num := strings.SplitN(f[1], ",", 2)[0]
		x, err := strconv.ParseFloat(num, 64)
		if err != nil {
			t.Fatal(err)
		}
		v = x
	}
	return v
}

func TestReplayRecomputesAndIsDeterministic(t *testing.T) {
	dir := t.TempDir()
	demo := filepath.Join(dir, "demo.yaml")
	os.WriteFile(demo, demoConfig, 0o644)
	half := filepath.Join(dir, "half.yaml")
	os.WriteFile(half, bytes.Replace(demoConfig, []byte("volumetric_efficiency: 0.9"), []byte("volumetric_efficiency: 0.45"), 1), 0o644)

	replayOut := func(cfg string) string {
		var out, errb bytes.Buffer
		if code := run([]string{"replay", "-config", cfg, "-in", "testdata/short-run.lp"}, &out, &errb); code != 0 {
			t.Fatalf("replay exited %d: %s", code, errb.String())
		}
		return out.String()
	}
	a, b := replayOut(demo), replayOut(demo)
	if a != b {
		t.Fatal("two replays of the same input differ")
	}
	// Derived from Heywood eq. 2.27 (the derive package's worked case):
	// 100 kPa, 25 °C, 3000 rpm, 1.998 L at VE 0.9 → 0.9·1.16844·0.001998·25 kg/s.
	want := 0.9 * (100000 / (287.05 * 298.15)) * 0.001998 * 25 * 1000
	if got := valueOf(t, a, "air_mass_flow"); math.Abs(got-want) > 1e-9*want {
		t.Fatalf("replayed air_mass_flow %v g/s, want %v", got, want)
	}
	// A changed configuration changes the result: half the VE, half the flow.
	if got := valueOf(t, replayOut(half), "air_mass_flow"); math.Abs(got-want/2) > 1e-9*want {
		t.Fatalf("with VE 0.45 air_mass_flow %v, want %v", got, want/2)
	}
	// The recorded derived value (boost 0) and the recorded event are not
	// passed through: both are recomputed.
	if strings.Contains(a, "kind=warning_raised,name=x") {
		t.Fatal("a recorded event was copied instead of recomputed")
	}
	if got := valueOf(t, a, "boost_pressure"); got != 0 {
		t.Fatalf("boost %v, want 0 (MAP = baro)", got)
	}
	var out, errb bytes.Buffer
	if code := run([]string{"replay", "-config", demo, "-in", "testdata/short-run.lp", "-csv"}, &out, &errb); code != 0 ||
		!strings.HasPrefix(out.String(), "time,seconds,") || !strings.Contains(out.String(), ",air_mass_flow (grams per second)") {
		t.Fatalf("csv replay: %d %s %s", code, errb.String(), out.String())
	}
	if code := run([]string{"replay", "-in", "testdata/short-run.lp"}, &out, &errb); code != 2 {
		t.Fatalf("replay of a bare file without -config exited %d, want 2", code)
	}
}

func TestPlotWritesPNGAndSVG(t *testing.T) {
	dir := t.TempDir()
	for _, name := range []string{"a.png", "a.svg"} {
		out := filepath.Join(dir, name)
		var o, e bytes.Buffer
		if code := run([]string{"plot", "-in", "testdata/short-run.lp,testdata/short-run.lp", "-out", out, "-channels", "manifold_pressure"}, &o, &e); code != 0 {
			t.Fatalf("plot %s exited %d: %s", name, code, e.String())
		}
		b, err := os.ReadFile(out)
		if err != nil {
			t.Fatal(err)
		}
		switch filepath.Ext(name) {
		case ".png":
			img, err := png.Decode(bytes.NewReader(b))
			if err != nil || img.Bounds().Dx() < 500 {
				t.Fatalf("png: %v %v", err, img)
			}
		case ".svg":
			if !bytes.Contains(b, []byte("<svg")) || !bytes.Contains(b, []byte("Corrected power")) || !bytes.Contains(b, []byte("short-run.lp")) {
				t.Fatalf("svg lacks the frame, a panel title or the run label")
			}
		}
	}
	var o, e bytes.Buffer
	if code := run([]string{"plot", "-in", "testdata/short-run.lp", "-out", filepath.Join(dir, "x.gif")}, &o, &e); code != 2 {
		t.Fatalf("plot to .gif exited %d, want 2", code)
	}
}

// Replay with a configuration of its own: the output is tagged with the
// recorded run's id, the summary names the configuration's path, and the
// events go to their own CSV.
func TestReplayTagsAndEvents(t *testing.T) {
	dir := t.TempDir()
	demo := filepath.Join(dir, "demo.yaml")
	os.WriteFile(demo, demoConfig, 0o644)
	sum, events := filepath.Join(dir, "summary.json"), filepath.Join(dir, "events.csv")
	var out, errb bytes.Buffer
	if code := run([]string{"replay", "-config", demo, "-in", "testdata/short-run.lp", "-summary", sum, "-events", events}, &out, &errb); code != 0 {
		t.Fatalf("replay exited %d: %s", code, errb.String())
	}
	if !strings.Contains(out.String(), ",run=short-run-replay,") || strings.Contains(out.String(), ",run=replay,") {
		t.Errorf("replay output not tagged run=short-run-replay:\n%.300s", out.String())
	}
	s, err := os.ReadFile(sum)
	if err != nil || !bytes.Contains(s, []byte(`"replay_of": "short-run"`)) || !bytes.Contains(s, []byte(`"replay_config": "`+demo+`"`)) {
		t.Errorf("summary %s (%v) does not name the run and the configuration %s", s, err, demo)
	}
	ev, err := os.ReadFile(events)
	if err != nil || !bytes.HasPrefix(ev, []byte("time,kind,name,duration_seconds")) {
		t.Errorf("events csv %q (%v)", ev, err)
	}
}
