package main

import (
	"bytes"
	"context"
	"encoding/json"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/record"
)

func TestRunStartStopCommands(t *testing.T) {
	recDir := t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	httpAddr, _, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.Record.Dir = recDir
		c.Record.Manual = true
		c.Record.ControlToken = "s3cret-token"
	})
	// Without the token: refused.
	resp, err := http.Post("http://"+httpAddr+"/api/runs/start", "text/plain", nil)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusUnauthorized {
		t.Fatalf("start without token: %s", resp.Status)
	}
	t.Setenv("PLENUM_CONTROL_TOKEN", "s3cret-token")
	var out, errb bytes.Buffer
	if code := run([]string{"run-start", "-addr", httpAddr, "-humidity-percent", "140"}, &out, &errb); code == 0 || !strings.Contains(errb.String(), "humidity_percent") {
		t.Fatalf("run-start with 140 %% humidity: %d %s", code, errb.String())
	}
	time.Sleep(700 * time.Millisecond) // let the ambient sensors be read
	if code := run([]string{"run-start", "-addr", httpAddr, "-label", "pull 1", "-notes", "fresh plugs", "-pressure-kpa", "99.1"}, &out, &errb); code != 0 {
		t.Fatalf("run-start: %d %s", code, errb.String())
	}
	var started map[string]string
	json.Unmarshal(out.Bytes(), &started)
	if code := run([]string{"run-start", "-addr", httpAddr}, &out, &errb); code == 0 {
		t.Fatal("a second run-start while recording succeeded")
	}
	time.Sleep(1500 * time.Millisecond)
	out.Reset()
	if code := run([]string{"run-stop", "-addr", httpAddr, "-json"}, &out, &errb); code != 0 {
		t.Fatalf("run-stop: %d %s", code, errb.String())
	}
	var sum record.Summary
	if err := json.Unmarshal(out.Bytes(), &sum); err != nil || sum.Samples < 1000 || sum.Run != started["run"] {
		t.Fatalf("summary %s (%v), started %v", out.String(), err, started)
	}
	dir := filepath.Join(recDir, sum.Run)
	for _, f := range []string{"run.json", "summary.json", "ended", "config.yaml"} {
		if _, err := os.Stat(filepath.Join(dir, f)); err != nil {
			t.Errorf("run directory lacks %s", f)
		}
	}
	// The data: 0001.lp, or 0001.lp.gz once the compressor has had it.
	if files, _ := record.DataFiles(dir); len(files) != 1 || !strings.HasPrefix(filepath.Base(files[0]), "0001.lp") {
		t.Errorf("run directory's data files: %v, want 0001.lp or 0001.lp.gz", files)
	}
	meta, _ := os.ReadFile(filepath.Join(dir, "run.json"))
	var m record.Meta
	if err := json.Unmarshal(meta, &m); err != nil || m.Label != "pull 1" || m.Notes != "fresh plugs" || m.Conditions == nil ||
		m.Conditions.PressurePa == nil || *m.Conditions.PressurePa != 99100 || m.Conditions.Source != "sensors+entered" ||
		m.Conditions.TemperatureC == nil || m.Conditions.RelativeHumidity == nil {
		t.Errorf("run.json (%v): %s", err, meta)
	}
	if code := run([]string{"run-stop", "-addr", httpAddr, "-json"}, &out, &errb); code == 0 {
		t.Fatal("run-stop with no run succeeded")
	}
	cancel()
	<-done
}

func TestRunCommandsOffWithoutToken(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	httpAddr, _, done := startDemo(t, ctx, 4, func(c *config.Config) { c.Record.Dir = t.TempDir() })
	req, _ := http.NewRequest(http.MethodPost, "http://"+httpAddr+"/api/runs/stop", nil)
	req.Header.Set("Authorization", "Bearer ")
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusForbidden {
		t.Fatalf("stop with commands off: %s", resp.Status)
	}
	cancel()
	<-done
}

// TestAutoTriggerRecordsThePulls: with the trigger on, the demo's pulls are
// recorded as a run that starts at wide-open throttle and ends once the
// throttle has been closed for 2 s (at 4× the two pulls, under a second of
// real time apart, make one run).
func TestAutoTriggerRecordsThePulls(t *testing.T) {
	recDir := t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	_, _, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.Record.Dir = recDir
		c.Record.Manual = true
		c.Record.AutoTrigger = true
	})
	deadline := time.Now().Add(20 * time.Second)
	var runs []string
	for time.Now().Before(deadline) {
		runs, _ = filepath.Glob(filepath.Join(recDir, "*", "ended"))
		if len(runs) >= 1 {
			break
		}
		time.Sleep(200 * time.Millisecond)
	}
	cancel()
	<-done
	if len(runs) != 1 {
		t.Fatalf("%d runs ended, want 1", len(runs))
	}
	b, err := os.ReadFile(filepath.Join(filepath.Dir(runs[0]), "summary.json"))
	if err != nil {
		t.Fatal(err)
	}
	var sum record.Summary
	json.Unmarshal(b, &sum)
	if sum.PeakBoostPa == nil || *sum.PeakBoostPa < 80000 || sum.PeakTorqueRPM == nil || *sum.PeakTorqueRPM < 3000 {
		t.Fatalf("the triggered run missed the pulls: %s", b)
	}
	if d := sum.End.Sub(sum.Start); d > 10*time.Second {
		t.Fatalf("the triggered run lasted %v: it should hold the pulls, not the whole cycle", d)
	}
}

// TestWarningAckCommand: `plenum warning-ack` reaches the daemon's
// warnings through its HTTP API: an unknown rule and a rule that is not
// raised are refused with the daemon's words, and a missing -rule is a
// usage error.
func TestWarningAckCommand(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	httpAddr, _, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.Record.Dir = t.TempDir()
		c.Record.Manual = true
		c.Record.ControlToken = "s3cret-token"
	})
	t.Setenv("PLENUM_CONTROL_TOKEN", "s3cret-token")
	cases := []struct {
		args     []string
		code     int
		inStderr string
	}{
		{[]string{"warning-ack", "-addr", httpAddr}, 2, "needs -rule"},
		{[]string{"warning-ack", "-addr", httpAddr, "-rule", "switched_off_warm"}, 1, "no such warning"},
		{[]string{"warning-ack", "-addr", httpAddr, "-rule", "switched_off_hot", "-by", "tester"}, 1, "warning is not raised"},
	}
	for _, c := range cases {
		var out, errb bytes.Buffer
		if code := run(c.args, &out, &errb); code != c.code || !strings.Contains(errb.String(), c.inStderr) {
			t.Errorf("%v: exit %d, stderr %q; want %d, %q", c.args, code, errb.String(), c.code, c.inStderr)
		}
	}
	cancel()
	<-done
}

// TestEnteredConditionsCorrectTheRun: conditions entered with run-start
// are the ones the run's power correction uses, whatever the demo's
// ambient sensors say, and the summary names them and the standard.
//
// SAE J1349 (JUN1990 and later): CF = 1.18·(99/p_d)·√((T+273)/298) − 0.18.
// Entered 98.2 kPa, 21.5 °C, 0 % humidity (p_d = 98.2 kPa), by hand:
// 1.18 · (99/98.2 = 1.0081466) · (√(294.5/298) = 0.9941102) − 0.18
// = 1.1826064 − 0.18 = 1.0026064.
func TestEnteredConditionsCorrectTheRun(t *testing.T) {
	recDir := t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	httpAddr, _, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.Record.Dir = recDir
		c.Record.Manual = true
		c.Record.ControlToken = "s3cret-token"
	})
	t.Setenv("PLENUM_CONTROL_TOKEN", "s3cret-token")
	var out, errb bytes.Buffer
	if code := run([]string{"run-start", "-addr", httpAddr, "-pressure-kpa", "98.2", "-temperature-c", "21.5", "-humidity-percent", "0"}, &out, &errb); code != 0 {
		t.Fatalf("run-start: %d %s", code, errb.String())
	}
	var started map[string]string
	if err := json.Unmarshal(out.Bytes(), &started); err != nil || started["run"] == "" {
		t.Fatalf("run-start printed %q (%v)", out.String(), err)
	}
	runDir := filepath.Join(recDir, started["run"])
	factors := func() []float64 {
		files, _ := record.DataFiles(runDir)
		rec, err := record.ReadAll(files)
		if err != nil {
			return nil // a line being written: read again
		}
		var cf []float64
		for _, p := range rec.Points {
			if rec.Channel(p) == "correction_factor" {
				cf = append(cf, p.Value)
			}
		}
		return cf
	}
	deadline := time.Now().Add(20 * time.Second)
	for len(factors()) < 20 {
		if time.Now().After(deadline) {
			t.Fatal("no correction factors recorded within 20 s")
		}
		time.Sleep(50 * time.Millisecond)
	}
	out.Reset()
	if code := run([]string{"run-stop", "-addr", httpAddr, "-json"}, &out, &errb); code != 0 {
		t.Fatalf("run-stop: %d %s", code, errb.String())
	}
	var sum record.Summary
	if err := json.Unmarshal(out.Bytes(), &sum); err != nil {
		t.Fatal(err)
	}
	if c := sum.Correction; c == nil || c.Standard != "sae_j1349" || c.Entered == nil || c.Entered.PressurePa == nil ||
		*c.Entered.PressurePa != 98200 || *c.Entered.TemperatureC != 21.5 || *c.Entered.RelativeHumidity != 0 || c.Others != "" {
		t.Errorf("summary's correction: %s", out.String())
	}
	// Samples derived just before the start but drained after it may be
	// in the run with the sensors' factor; from the first entered one on,
	// every factor is the entered conditions'.
	cf := factors()
	first := slices.IndexFunc(cf, func(v float64) bool { return math.Abs(v-1.0026064) <= 5e-7 })
	if first < 0 || first > 5 || len(cf)-first < 15 {
		t.Fatalf("%d correction factors, the entered one from %d on: %v", len(cf), first, cf)
	}
	for i, v := range cf[first:] {
		if math.Abs(v-1.0026064) > 5e-7 {
			t.Fatalf("correction factor %d of %d is %.7f, want 1.0026064 (the entered conditions)", i, len(cf), v)
		}
	}
	cancel()
	<-done
}
