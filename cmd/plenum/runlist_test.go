package main

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// runsDir returns a recording directory holding the golden run (linked)
// and a labelled copy of it with notes, entered conditions and a
// correction standard, which ended without its end marker.
func runsDir(t *testing.T) string {
	t.Helper()
	dir := t.TempDir()
	golden, err := filepath.Abs(goldenRun)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.Symlink(golden, filepath.Join(dir, "20261202T054301.329Z")); err != nil {
		t.Fatal(err)
	}
	second := filepath.Join(dir, "20261202T061500.000Z")
	if err := os.Mkdir(second, 0o755); err != nil {
		t.Fatal(err)
	}
	for _, f := range []string{"0001.lp.gz", "summary.json"} {
		if err := os.Symlink(filepath.Join(golden, f), filepath.Join(second, f)); err != nil {
			t.Fatal(err)
		}
	}
	p, temp, rh := 99500.0, 28.0, 0.6
	m := record.Meta{ID: "20261202T061500.000Z", Vehicle: "brackenfell-rs", Label: "Pull 2, new intake",
		Notes:      "Customer car, 98 RON.\nSecond pull after heat soak.",
		Start:      time.Date(2026, 12, 2, 6, 15, 0, 0, time.UTC),
		Conditions: &record.Conditions{PressurePa: &p, TemperatureC: &temp, RelativeHumidity: &rh, Source: "entered"},
		Correction: &record.Correction{Standard: "sae_j1349", Entered: &record.Conditions{PressurePa: &p, TemperatureC: &temp, RelativeHumidity: &rh},
			Others: "the ambient channels while fresh, else the configured defaults"}}
	b, err := json.MarshalIndent(m, "", "  ")
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(second, "run.json"), b, 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.Mkdir(filepath.Join(dir, "not-a-run"), 0o755); err != nil {
		t.Fatal(err)
	}
	return dir
}

// golden compares got with the file testdata/name, which -update rewrites.
func golden(t *testing.T, name string, got []byte) {
	t.Helper()
	path := filepath.Join("testdata", name)
	if *update {
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("output differs from %s (run with -update after a deliberate change):\n%s", path, got)
	}
}

// TestRunsAndShowGolden: the runs listing, filtered and not, and one run
// shown in default and in chosen units, against golden files.
func TestRunsAndShowGolden(t *testing.T) {
	dir := runsDir(t)
	cases := []struct {
		name string
		args []string
	}{
		{"runs.golden", []string{"runs", "-dir", dir}},
		{"runs-label.golden", []string{"runs", "-dir", dir, "-label", "INTAKE", "-since", "2026-12-02T06:00"}},
		{"runs-none.golden", []string{"runs", "-dir", dir, "-vehicle", "other-car"}},
		{"show-golden-run.golden", []string{"show", goldenRun}},
		{"show-labelled.golden", []string{"show", "20261202T061500.000Z", "-dir", dir, "-units", "power=hp_mech,torque=lbft,pressure=psi,temperature=F,mixture=afr"}},
	}
	for _, c := range cases {
		var so, se bytes.Buffer
		if code := run(c.args, &so, &se); code != 0 {
			t.Fatalf("%v: exit %d: %s", c.args, code, se.String())
		}
		golden(t, c.name, so.Bytes())
		assertHumanPrecision(t, c.name, so.String())
	}
	for _, args := range [][]string{
		{"runs"}, {"runs", "-dir", dir, "-since", "yesterday"}, {"runs", "-dir", dir, "-units", "power=bhp"},
		{"show"}, {"show", "-dir", dir}, {"show", "a", "b"},
	} {
		var so, se bytes.Buffer
		if code := run(args, &so, &se); code != 2 {
			t.Errorf("%v: exit %d, want 2: %s", args, code, se.String())
		}
	}
	// RUN after the flags reads the same.
	var so, se bytes.Buffer
	if code := run([]string{"show", "-units=power=hp_mech,torque=lbft,pressure=psi,temperature=F,mixture=afr", "-dir", dir, "20261202T061500.000Z"}, &so, &se); code != 0 {
		t.Errorf("show with RUN last: exit %d: %s", code, se.String())
	} else {
		golden(t, "show-labelled.golden", so.Bytes())
	}
	so.Reset()
	se.Reset()
	if code := run([]string{"show", "no-such-run", "-dir", dir}, &so, &se); code != 1 || !strings.Contains(se.String(), "no-such-run") {
		t.Errorf("show of a missing run: exit %d: %s", code, se.String())
	}
}

// numberRE finds the numbers a person reads.
var numberRE = regexp.MustCompile(`-?\d+(\.\d+)?`)

// notQuantities are run ids and clock times, which are not quantities.
var notQuantities = regexp.MustCompile(`\d{8}T\d{6}\.\d{3}Z|\d{4}-\d\d-\d\d \d\d:\d\d:\d\d|\d{4}-\d\d-\d\d`)

// overPrecise returns the numbers in out with more digits than any
// quantity shown to a person carries: more than three decimals (λ and the
// correction factor have three), or more than five significant digits;
// and any of the golden run's raw SI values.
func overPrecise(out string) []string {
	var bad []string
	for _, raw := range []string{"221240", "100800.6", "0.98831", "335.6", "44.7498", "0.44999", "108222.99"} {
		if strings.Contains(out, raw) {
			bad = append(bad, raw)
		}
	}
	for _, n := range numberRE.FindAllString(notQuantities.ReplaceAllString(out, ""), -1) {
		digits := strings.TrimLeft(strings.ReplaceAll(strings.TrimPrefix(n, "-"), ".", ""), "0")
		if i := strings.IndexByte(n, '.'); i >= 0 && len(n)-i-1 > 3 || len(digits) > 5 {
			bad = append(bad, n)
		}
	}
	return bad
}

// assertHumanPrecision fails when out prints a number more precisely than a
// person reads it.
func assertHumanPrecision(t *testing.T, name, out string) {
	t.Helper()
	if bad := overPrecise(out); len(bad) > 0 {
		t.Errorf("%s prints %q: more digits than a person reads:\n%s", name, bad, out)
	}
}

// The precision check catches what the issue saw, and passes what a
// person reads.
func TestOverPrecise(t *testing.T) {
	cases := []struct {
		out  string
		want int
	}{
		{"peak 220749.64 W at 6594 rpm", 1},
		{"λ 0.9998720000000001", 1},
		{"0.9883120000000001 λ", 2}, // a raw value of the golden run, and too many digits
		{"peak 221 kW at 6608 rpm, factor 0.984, t90 2.40 s, 14.4 psi", 0},
		{"Run 20261202T054301.329Z started 2026-12-02 05:43:01 UTC", 0},
		{"52488 written", 0},
	}
	for _, c := range cases {
		if got := overPrecise(c.out); len(got) != c.want {
			t.Errorf("overPrecise(%q) = %q, want %d finding(s)", c.out, got, c.want)
		}
	}
}

// The peaks show prints for each pull are the dyno sheet's: the same
// smoothed trace, the same numbers.
func TestShowAgreesWithTheSheet(t *testing.T) {
	var sheetOut, showOut, errb bytes.Buffer
	if code := run([]string{"sheet", "-in", goldenRun, "-out", filepath.Join(t.TempDir(), "s.svg")}, &sheetOut, &errb); code != 0 {
		t.Fatalf("sheet: %d %s", code, errb.String())
	}
	if code := run([]string{"show", goldenRun}, &showOut, &errb); code != 0 {
		t.Fatalf("show: %d %s", code, errb.String())
	}
	pulls := 0
	for _, l := range strings.Split(sheetOut.String(), "\n") {
		_, rest, ok := strings.Cut(l, ": ")
		if !ok || !strings.Contains(l, "pull") {
			continue
		}
		pulls++
		power, _, _ := strings.Cut(rest, " (raw")
		_, torque, _ := strings.Cut(rest, "), ")
		torque, _, _ = strings.Cut(torque, " (raw")
		for _, want := range []string{power, torque} {
			if want = strings.ReplaceAll(want, " @ ", " at "); !strings.Contains(showOut.String(), want) {
				t.Errorf("show lacks the sheet's peak %q:\n%s", want, showOut.String())
			}
		}
	}
	if pulls != 2 {
		t.Fatalf("the sheet listed %d pulls of the golden run, want 2:\n%s", pulls, sheetOut.String())
	}
}
