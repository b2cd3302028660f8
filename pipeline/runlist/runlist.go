// Package runlist finds recorded runs in a recording directory and reads
// what a person wants to know about each: its label, vehicle, start,
// length, how it ended, its peaks, the correction standard and factor, its
// turbo-lag measurements and warnings. It also writes them for a person, in
// the display layer's units (listing.go, show.go).
package runlist

import (
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/sheet"
)

// Config says where runs are recorded.
type Config struct {
	// Dir is the recording directory: one subdirectory per run, each with
	// its run.json.
	Dir string
}

// Filter chooses runs. The zero Filter chooses every run.
type Filter struct {
	// Label chooses runs whose label contains this text, ignoring case.
	Label string
	// Vehicle chooses runs of this vehicle, ignoring case.
	Vehicle string
	// Since and Until, when not zero, bound the run's start: Since <=
	// start < Until.
	Since, Until time.Time
}

// Match reports whether m is chosen by f.
func (f Filter) Match(m record.Meta) bool {
	if f.Label != "" && !strings.Contains(strings.ToLower(m.Label), strings.ToLower(f.Label)) {
		return false
	}
	if f.Vehicle != "" && !strings.EqualFold(m.Vehicle, f.Vehicle) {
		return false
	}
	if !f.Since.IsZero() && m.Start.Before(f.Since) {
		return false
	}
	if !f.Until.IsZero() && !m.Start.Before(f.Until) {
		return false
	}
	return true
}

// Ending is how a run ended.
type Ending uint8

const (
	// NotEnded is a run with no end marker: still recording, or cut short and
	// not yet recovered by a daemon's start.
	NotEnded Ending = iota
	// Normally is a run its recorder closed.
	Normally
	// Abnormally is a run found cut short and recovered.
	Abnormally
)

// String says how the run ended, in a word or two.
func (e Ending) String() string {
	switch e {
	case Normally:
		return "normally"
	case Abnormally:
		return "cut short"
	}
	return "not ended"
}

// Peak is a highest value and the engine speed it was reached at.
type Peak struct {
	Value, RPM float64
	OK         bool // false: the run has no such value
}

// Run is one recorded run as read from its directory.
type Run struct {
	Dir  string
	Meta record.Meta
	// Summary is the recorder's summary.json; nil when the run has none
	// (not ended normally).
	Summary *record.Summary
	Ended   Ending
	// Start and End are the times of the run's first and last sample
	// (from the summary, else of the peaks' channels in the recording).
	Start, End time.Time
	// Peaks from every usable sample of the recording: corrected power,
	// corrected torque (measured torque times the latest correction
	// factor) and measured torque, each with the engine speed then.
	Power, Torque, MeasuredTorque Peak
	// Factor is the correction factor: its mean over the run, and its
	// least and greatest value. NaN when the run has none.
	Factor, FactorMin, FactorMax float64
	// Events are the run's recorded events in time order.
	Events []pipeline.Event
	// Pulls are the peaks of each wide-open-throttle pull as the dyno
	// sheet finds, smooths and draws them (pipeline/sheet with its
	// default smoothing), with the raw peak beside: the numbers on the
	// sheet and in show agree.
	Pulls []sheet.PullPeaks
}

// Label is the run's label, or its id when it has none.
func (r Run) Label() string {
	if r.Meta.Label != "" {
		return r.Meta.Label
	}
	return r.Meta.ID
}

// Duration is the time from the first sample to the last.
func (r Run) Duration() time.Duration { return r.End.Sub(r.Start) }

// Standard is the name of the correction standard recorded with the run,
// "" when none was recorded.
func (r Run) Standard() string {
	if r.Meta.Correction != nil {
		return r.Meta.Correction.Standard
	}
	if r.Summary != nil && r.Summary.Correction != nil {
		return r.Summary.Correction.Standard
	}
	return ""
}

// Warnings is the number of warnings raised in the run.
func (r Run) Warnings() int {
	n := 0
	for _, e := range r.Events {
		if e.Kind == "warning_raised" {
			n++
		}
	}
	return n
}

// List reads the runs under cfg.Dir that f chooses, oldest first. A
// subdirectory (or a link to one) without run.json is not a run and is
// skipped; a run whose files cannot be read is an error naming the file.
// Errors carry no package prefix: the caller's command names itself.
func List(cfg Config, f Filter) ([]Run, error) {
	if cfg.Dir == "" {
		return nil, errors.New("no recording directory given")
	}
	ents, err := os.ReadDir(cfg.Dir)
	if err != nil {
		return nil, err
	}
	var runs []Run
	for _, e := range ents {
		dir := filepath.Join(cfg.Dir, e.Name())
		if st, err := os.Stat(dir); err != nil || !st.IsDir() { // a link to a run counts
			continue
		}
		m, err := readMeta(dir)
		if errors.Is(err, os.ErrNotExist) {
			continue
		}
		if err != nil {
			return nil, err
		}
		if !f.Match(m) {
			continue
		}
		r, err := read(dir, m)
		if err != nil {
			return nil, err
		}
		runs = append(runs, r)
	}
	sort.SliceStable(runs, func(i, j int) bool { return runs[i].Meta.Start.Before(runs[j].Meta.Start) })
	return runs, nil
}

// Open reads one run: name is a run directory, or a run id under cfg.Dir.
func Open(cfg Config, name string) (Run, error) {
	dir := name
	if _, err := os.Stat(filepath.Join(dir, "run.json")); err != nil && cfg.Dir != "" {
		dir = filepath.Join(cfg.Dir, name)
	}
	m, err := readMeta(dir)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return Run{}, fmt.Errorf("%s is not a recorded run: no run.json in %s", name, dir)
		}
		return Run{}, err
	}
	return read(dir, m)
}

func readMeta(dir string) (record.Meta, error) {
	var m record.Meta
	b, err := os.ReadFile(filepath.Join(dir, "run.json"))
	if err != nil {
		return m, err
	}
	if err := json.Unmarshal(b, &m); err != nil {
		return m, fmt.Errorf("%s: %w", filepath.Join(dir, "run.json"), err)
	}
	if m.ID == "" {
		m.ID = filepath.Base(dir)
	}
	return m, nil
}

// read reads the rest of a run whose meta is m.
func read(dir string, m record.Meta) (Run, error) {
	r := Run{Dir: dir, Meta: m, Factor: math.NaN(), FactorMin: math.NaN(), FactorMax: math.NaN()}
	switch {
	case exists(filepath.Join(dir, "ended")):
		r.Ended = Normally
	case exists(filepath.Join(dir, "ended_abnormally")):
		r.Ended = Abnormally
	}
	if b, err := os.ReadFile(filepath.Join(dir, "summary.json")); err == nil {
		var s record.Summary
		if err := json.Unmarshal(b, &s); err != nil {
			return Run{}, fmt.Errorf("%s: %w", filepath.Join(dir, "summary.json"), err)
		}
		r.Summary = &s
		r.Start, r.End = s.Start, s.End
	}
	files, err := record.DataFiles(dir)
	if err != nil {
		return Run{}, err
	}
	if len(files) == 0 {
		return r, nil
	}
	rec, err := record.ReadChannels(files, peakChannels...)
	if err != nil {
		return Run{}, err
	}
	if r.Events, err = record.ReadEvents(files); err != nil {
		return Run{}, err
	}
	r.peaks(rec)
	var sc sheet.Config
	for _, p := range sc.Build(r.Meta, rec).Pulls {
		r.Pulls = append(r.Pulls, sc.Peaks(p))
	}
	return r, nil
}

// peakChannels are the channels peaks reads.
var peakChannels = []string{"engine_speed", "dyno_torque", "corrected_power", "correction_factor",
	"throttle_position", "boost_pressure", "lambda"} // the last for the sheet's pulls

// peaks folds the recording into the run's peaks and correction factor,
// and its start and end when the summary gave none.
func (r *Run) peaks(rec record.Recording) {
	var rpm, factor float64
	var haveRPM, haveFactor bool
	var sum float64
	n := 0
	take := func(p *Peak, v float64) {
		if !p.OK || v > p.Value {
			*p = Peak{Value: v, OK: true, RPM: math.NaN()}
			if haveRPM {
				p.RPM = rpm
			}
		}
	}
	if len(rec.Points) > 0 && r.Summary == nil {
		// Without a summary: from the first to the last sample of these
		// channels.
		r.Start = time.Unix(0, rec.Points[0].NS).UTC()
		r.End = time.Unix(0, rec.Points[len(rec.Points)-1].NS).UTC()
	}
	for _, p := range rec.Points {
		if !p.Quality.Usable() || math.IsNaN(p.Value) || math.IsInf(p.Value, 0) {
			continue
		}
		switch rec.Channel(p) {
		case "engine_speed":
			rpm, haveRPM = p.Value, true
		case "dyno_torque":
			take(&r.MeasuredTorque, p.Value)
			if haveFactor {
				take(&r.Torque, p.Value*factor)
			}
		case "corrected_power":
			take(&r.Power, p.Value)
		case "correction_factor":
			sum += p.Value
			n++
			if n == 1 || p.Value < r.FactorMin {
				r.FactorMin = p.Value
			}
			if n == 1 || p.Value > r.FactorMax {
				r.FactorMax = p.Value
			}
			factor, haveFactor = p.Value, true
		}
	}
	if n > 0 {
		r.Factor = sum / float64(n)
	}
}

func exists(p string) bool {
	_, err := os.Stat(p)
	return err == nil
}

// timeLayouts are the forms ParseTime accepts, UTC unless they say.
var timeLayouts = []string{time.RFC3339Nano, "2006-01-02T15:04:05", "2006-01-02T15:04", "2006-01-02 15:04:05", "2006-01-02 15:04", "2006-01-02"}

// ParseTime reads a time for a Filter: a date (2026-12-02), a date and time
// (2026-12-02T05:43, 2026-12-02 05:43:01), taken as UTC, or RFC 3339 with
// its offset.
func ParseTime(s string) (time.Time, error) {
	for _, l := range timeLayouts {
		if t, err := time.Parse(l, s); err == nil {
			return t, nil
		}
	}
	return time.Time{}, fmt.Errorf("%q is not a date (2026-12-02), a date and time in UTC (2026-12-02T05:43) or RFC 3339", s)
}

// Flags registers f's fields as flags of fs: -label, -vehicle, -since and
// -until (times as ParseTime reads them).
func (f *Filter) Flags(fs *flag.FlagSet) {
	fs.StringVar(&f.Label, "label", "", "only runs whose label contains this `text` (any case)")
	fs.StringVar(&f.Vehicle, "vehicle", "", "only runs of this `vehicle`")
	fs.Var(timeValue{&f.Since}, "since", "only runs started at or after this `time` (2026-12-02, 2026-12-02T05:43 UTC, or RFC 3339)")
	fs.Var(timeValue{&f.Until}, "until", "only runs started before this `time`")
}

// timeValue is a time flag.
type timeValue struct{ t *time.Time }

func (v timeValue) String() string {
	if v.t == nil || v.t.IsZero() {
		return ""
	}
	return v.t.Format(time.RFC3339)
}

func (v timeValue) Set(s string) error {
	t, err := ParseTime(s)
	if err != nil {
		return err
	}
	*v.t = t
	return nil
}
