package runlist

import (
	"bytes"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/record"
)

const goldenRun = "../../testdata/golden-run"

func TestFilter(t *testing.T) {
	m := record.Meta{ID: "r1", Vehicle: "Brackenfell-RS", Label: "Pull 2, new intake", Start: time.Date(2026, 12, 2, 6, 15, 0, 0, time.UTC)}
	day := time.Date(2026, 12, 2, 0, 0, 0, 0, time.UTC)
	cases := []struct {
		name string
		f    Filter
		want bool
	}{
		{"zero", Filter{}, true},
		{"label text, any case", Filter{Label: "INTAKE"}, true},
		{"label text absent", Filter{Label: "exhaust"}, false},
		{"vehicle, any case", Filter{Vehicle: "brackenfell-rs"}, true},
		{"vehicle is not a substring match", Filter{Vehicle: "brackenfell"}, false},
		{"since the day", Filter{Since: day}, true},
		{"since the start itself", Filter{Since: m.Start}, true},
		{"since later", Filter{Since: m.Start.Add(time.Second)}, false},
		{"until the start excludes it", Filter{Until: m.Start}, false},
		{"until the next day", Filter{Until: day.AddDate(0, 0, 1)}, true},
		{"all together", Filter{Label: "pull", Vehicle: "BRACKENFELL-RS", Since: day, Until: day.AddDate(0, 0, 1)}, true},
	}
	for _, c := range cases {
		if got := c.f.Match(m); got != c.want {
			t.Errorf("%s: Match = %v, want %v", c.name, got, c.want)
		}
	}
}

func TestParseTime(t *testing.T) {
	cases := []struct {
		in   string
		want time.Time
		ok   bool
	}{
		{"2026-12-02", time.Date(2026, 12, 2, 0, 0, 0, 0, time.UTC), true},
		{"2026-12-02T05:43", time.Date(2026, 12, 2, 5, 43, 0, 0, time.UTC), true},
		{"2026-12-02 05:43:01", time.Date(2026, 12, 2, 5, 43, 1, 0, time.UTC), true},
		{"2026-12-02T07:43:01+02:00", time.Date(2026, 12, 2, 5, 43, 1, 0, time.UTC), true},
		{"yesterday", time.Time{}, false},
		{"02/12/2026", time.Time{}, false},
	}
	for _, c := range cases {
		got, err := ParseTime(c.in)
		if (err == nil) != c.ok || c.ok && !got.Equal(c.want) {
			t.Errorf("ParseTime(%q) = %v, %v; want %v (ok %v)", c.in, got, err, c.want, c.ok)
		}
	}
}

func TestDuration(t *testing.T) {
	cases := []struct {
		d    time.Duration
		want string
	}{
		{0, none},
		{48300 * time.Millisecond, "48.3 s"},
		{61900 * time.Millisecond, "1 min 02 s"},
		{65 * time.Minute, "1 h 05 min"},
	}
	for _, c := range cases {
		if got := duration(c.d); got != c.want {
			t.Errorf("duration(%v) = %q, want %q", c.d, got, c.want)
		}
	}
}

// The golden run read back: its end, its peaks from the recording agree
// with the recorder's summary, the correction factor's mean lies in its
// range, and its events are the summary's lag events and warnings.
func TestOpenGoldenRun(t *testing.T) {
	r, err := Open(Config{}, goldenRun)
	if err != nil {
		t.Fatal(err)
	}
	s := r.Summary
	if s == nil || r.Ended != Normally || r.Meta.ID != "20261202T054301.329Z" || r.Label() != r.Meta.ID {
		t.Fatalf("run %+v", r)
	}
	if !r.Power.OK || r.Power.Value != *s.PeakCorrectedPowerW || r.Power.RPM != *s.PeakPowerRPM {
		t.Errorf("peak power %+v, summary %v at %v", r.Power, *s.PeakCorrectedPowerW, *s.PeakPowerRPM)
	}
	if r.MeasuredTorque.Value != *s.PeakTorqueNm || r.MeasuredTorque.RPM != *s.PeakTorqueRPM {
		t.Errorf("measured torque %+v, summary %v at %v", r.MeasuredTorque, *s.PeakTorqueNm, *s.PeakTorqueRPM)
	}
	if !(r.FactorMin <= r.Factor && r.Factor <= r.FactorMax) || math.IsNaN(r.Factor) {
		t.Errorf("factor %v not in [%v, %v]", r.Factor, r.FactorMin, r.FactorMax)
	}
	// Corrected torque is measured torque times the factor of the moment.
	if lo, hi := r.MeasuredTorque.Value*r.FactorMin, r.MeasuredTorque.Value*r.FactorMax; r.Torque.Value < lo-1e-9 || r.Torque.Value > hi+1e-9 {
		t.Errorf("corrected torque %v outside [%v, %v]", r.Torque.Value, lo, hi)
	}
	lags := 0
	for _, e := range r.Events {
		if e.Kind == "turbo_lag" {
			lags++
		}
	}
	if lags != s.LagEvents || r.Warnings() != s.WarningsRaised {
		t.Errorf("%d lag events and %d warnings; summary %d and %d", lags, r.Warnings(), s.LagEvents, s.WarningsRaised)
	}
	if r.Duration() != s.End.Sub(s.Start) {
		t.Errorf("duration %v", r.Duration())
	}
}

// A run without summary or end marker: not ended, its times from the
// recording; a directory without run.json is not listed; Open refuses it.
func TestListUnended(t *testing.T) {
	dir := t.TempDir()
	rd := filepath.Join(dir, "r1")
	os.Mkdir(rd, 0o755)
	os.Mkdir(filepath.Join(dir, "junk"), 0o755)
	os.WriteFile(filepath.Join(rd, "run.json"), []byte(`{"id":"r1","vehicle":"v","label":"first","start":"2027-01-15T08:00:00Z"}`), 0o644)
	os.WriteFile(filepath.Join(rd, "0001.lp"), []byte(
		"plenum,channel=engine_speed,run=r1,source=mcu,vehicle=v value=3000,quality=\"ok\" 1800000000000000000\n"+
			"plenum,channel=corrected_power,run=r1,source=derived,vehicle=v value=100000,quality=\"ok\" 1800000000000000000\n"+
			"plenum_event,kind=warning_raised,name=x,run=r1,vehicle=v active=1,duration_seconds=0 1800000002000000000\n"+
			"plenum,channel=engine_speed,run=r1,source=mcu,vehicle=v value=4000,quality=\"ok\" 1800000003000000000\n"), 0o644)
	runs, err := List(Config{Dir: dir}, Filter{})
	if err != nil {
		t.Fatal(err)
	}
	if len(runs) != 1 {
		t.Fatalf("%d runs, want 1", len(runs))
	}
	r := runs[0]
	if r.Ended != NotEnded || r.Summary != nil || r.Duration() != 3*time.Second || r.Warnings() != 1 ||
		r.Power.Value != 100000 || r.Power.RPM != 3000 || r.Torque.OK || !math.IsNaN(r.Factor) {
		t.Errorf("run %+v", r)
	}
	f, _ := display.New(display.Config{})
	var b strings.Builder
	if err := WriteList(&b, runs, f); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "100 kW at 3000 rpm") || !strings.Contains(b.String(), "not ended") || !strings.Contains(b.String(), "first") {
		t.Errorf("listing:\n%s", b.String())
	}
	if _, err := Open(Config{Dir: dir}, "junk"); err == nil || !strings.Contains(err.Error(), "junk") {
		t.Errorf("Open of a directory without run.json: %v", err)
	}
	if _, err := List(Config{}, Filter{}); err == nil {
		t.Error("List without a directory succeeded")
	}
}

// A stopped run's summary for a person: display units, no float noise.
func TestWriteSummary(t *testing.T) {
	p, rpm, tq, trpm, boost := 220749.64, 6594.0, 330.12345, 4266.0, 109749.9
	s := record.Summary{Run: "r1", Start: time.Unix(0, 0), End: time.Unix(62, 0), Samples: 52488,
		PeakCorrectedPowerW: &p, PeakPowerRPM: &rpm, PeakTorqueNm: &tq, PeakTorqueRPM: &trpm, PeakBoostPa: &boost,
		LagEvents: 2, WarningsRaised: 5}
	var b bytes.Buffer
	if err := WriteSummary(&b, s, display.Formatter{}); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"run r1 stopped: 1 min 02 s, 52488 samples written, 0 lost", "221 kW at 6594 rpm", "330 N·m at 4266 rpm", "110 kPa gauge", "turbo-lag events      2"} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("summary lacks %q:\n%s", want, b.String())
		}
	}
	if strings.Contains(b.String(), "220749") || strings.Contains(b.String(), "330.12") {
		t.Errorf("SI float noise in:\n%s", b.String())
	}
}
