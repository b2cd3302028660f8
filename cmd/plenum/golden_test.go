package main

import (
	"bytes"
	"encoding/json"
	"flag"
	"os"
	"path/filepath"
	"testing"

	"github.com/plenum-engine/plenum/pipeline/record"
)

var update = flag.Bool("update", false, "rewrite golden files")

// goldenRun is a whole 60 s demo cycle recorded by the daemon (`plenum run`
// with the demo configuration and simulator.frame_rate_hz: 20), gzipped;
// only the record paths in its config.yaml were changed.
const goldenRun = "../../testdata/golden-run"

// TestGoldenRun replays the recorded run with its own configuration. The
// replayed summary must equal the expected one byte for byte, and agree
// with the summary the live daemon wrote when it recorded the run: the same
// inputs through the same derivations give the same peaks, lag events and
// warnings.
func TestGoldenRun(t *testing.T) {
	dir := t.TempDir()
	sumPath := filepath.Join(dir, "summary.json")
	var so, se bytes.Buffer
	if code := run([]string{"replay", "-in", goldenRun, "-out", filepath.Join(dir, "out.lp"), "-summary", sumPath}, &so, &se); code != 0 {
		t.Fatalf("replay: %d %s", code, se.String())
	}
	got, err := os.ReadFile(sumPath)
	if err != nil {
		t.Fatal(err)
	}
	want := filepath.Join(goldenRun, "expected-replay-summary.json")
	if *update {
		if err := os.WriteFile(want, got, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	exp, err := os.ReadFile(want)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, exp) {
		t.Errorf("replayed summary differs from %s (run with -update after a deliberate change):\n%s", want, got)
	}

	var rep, live record.Summary
	if err := json.Unmarshal(got, &rep); err != nil {
		t.Fatal(err)
	}
	b, err := os.ReadFile(filepath.Join(goldenRun, "summary.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(b, &live); err != nil {
		t.Fatal(err)
	}
	eq := func(name string, a, b *float64) {
		t.Helper()
		if a == nil || b == nil || *a != *b {
			t.Errorf("%s: replay %v, live %v", name, deref(a), deref(b))
		}
	}
	eq("peak corrected power", rep.PeakCorrectedPowerW, live.PeakCorrectedPowerW)
	eq("engine speed at peak power", rep.PeakPowerRPM, live.PeakPowerRPM)
	eq("peak torque", rep.PeakTorqueNm, live.PeakTorqueNm)
	eq("engine speed at peak torque", rep.PeakTorqueRPM, live.PeakTorqueRPM)
	eq("peak boost", rep.PeakBoostPa, live.PeakBoostPa)
	eq("min lambda under load", rep.MinLambdaUnderLoad, live.MinLambdaUnderLoad)
	eq("max lambda under load", rep.MaxLambdaUnderLoad, live.MaxLambdaUnderLoad)
	eq("max IAT", rep.MaxIntakeAirC, live.MaxIntakeAirC)
	if rep.LagEvents != live.LagEvents || rep.WarningsRaised != live.WarningsRaised || !rep.Start.Equal(live.Start) || !rep.End.Equal(live.End) {
		t.Errorf("replay: %d lag events, %d warnings, %v–%v; live: %d, %d, %v–%v", rep.LagEvents, rep.WarningsRaised, rep.Start, rep.End,
			live.LagEvents, live.WarningsRaised, live.Start, live.End)
	}
	// The demo cycle's known content: two tip-ins, the lean moment, the
	// cold rev (see TestDemoDetectors), boost near the wastegate's 110 kPa.
	if rep.LagEvents != 2 || rep.WarningsRaised < 3 || *rep.PeakBoostPa < 100000 || *rep.PeakBoostPa > 120000 {
		t.Errorf("golden run content: %s", got)
	}
	// The live recording and the replayed one hold one value per channel,
	// source and instant.
	assertNoDuplicateKeys(t, filepath.Join(goldenRun, "0001.lp.gz"))
	assertNoDuplicateKeys(t, filepath.Join(dir, "out.lp"))
}

// assertNoDuplicateKeys reads recorded line-protocol files with the
// recorder's reader and fails on any (channel, source, time) written twice:
// a time-series database keeps one point per series and time, so a second
// value would silently replace the first.
func assertNoDuplicateKeys(t *testing.T, files ...string) {
	t.Helper()
	rec, err := record.ReadAll(files)
	if err != nil {
		t.Fatal(err)
	}
	type key struct {
		k  uint32
		ns int64
	}
	seen := make(map[key]struct{}, len(rec.Points))
	dups := 0
	for _, p := range rec.Points {
		k := key{p.Key, p.NS}
		if _, ok := seen[k]; ok {
			if dups < 5 {
				t.Errorf("%s from %s at %d written twice", rec.Keys[p.Key].Channel, rec.Keys[p.Key].Source, p.NS)
			}
			dups++
		}
		seen[k] = struct{}{}
	}
	if dups > 0 {
		t.Errorf("%d duplicate (channel, source, time) keys in %d points", dups, len(rec.Points))
	}
	if len(rec.Points) < 1000 {
		t.Errorf("only %d points: not a run", len(rec.Points))
	}
}

func deref(p *float64) any {
	if p == nil {
		return nil
	}
	return *p
}

// A demo recording of a whole drive cycle (60 s of engine time at ten times
// real time) holds no (channel, source, time) key twice: every serial line
// and every OBD answer entered the pipeline as one frame.
func TestDemoRecordingHasNoDuplicateKeys(t *testing.T) {
	if testing.Short() {
		t.Skip("records 6 s of demo")
	}
	t.Setenv("XDG_CACHE_HOME", t.TempDir()) // the demo's turbo state and outbox
	dir := t.TempDir()
	var so, se bytes.Buffer
	args := []string{"demo", "-record", dir, "-for", "6s", "-time-scale", "10", "-http", "127.0.0.1:0", "-mqtt", "127.0.0.1:0"}
	if code := run(args, &so, &se); code != 0 {
		t.Fatalf("demo: %d %s %s", code, so.String(), se.String())
	}
	var files []string // .lp, or .lp.gz once the compressor has had it
	runDirs, _ := record.RunDirs(dir)
	for _, rd := range runDirs {
		f, _ := record.DataFiles(rd)
		files = append(files, f...)
	}
	if len(files) == 0 {
		t.Fatalf("no recording under %s:\n%s", dir, so.String())
	}
	assertNoDuplicateKeys(t, files...)
	rec, err := record.ReadAll(files)
	if err != nil {
		t.Fatal(err)
	}
	sources := map[string]bool{}
	for _, k := range rec.Keys {
		sources[k.Source] = true
	}
	if !sources["ecu"] || !sources["derived"] {
		t.Errorf("the recording lacks the ECU's or the derived channels: sources %v", sources)
	}
}
