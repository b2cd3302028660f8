// Package sheet draws the dyno sheet of recorded runs: corrected power and
// corrected torque against engine speed, boost and λ against engine speed,
// chosen channels against time since each pull's tip-in, several runs and
// pulls overlaid and labelled, under a header with the vehicle, date,
// correction standard, factor and conditions, and a table of each pull's
// peaks. Pulls are found by derive.PullTrigger, the daemon's own trigger;
// curves are smoothed by a centred moving average stated on the sheet and
// peaks read from the smoothed curve, with the raw peak beside them.
package sheet

import (
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/replay"
)

// Config configures a sheet. The zero value draws a metric sheet with the
// default smoothing.
type Config struct {
	// Display converts values into the units a person reads (kW or hp,
	// N·m or lbf·ft, kPa, bar or psi, λ or AFR).
	Display display.Formatter
	// BinRPM is the width of the engine-speed bins samples are averaged
	// into; 0 means 50 rpm.
	BinRPM float64
	// Window is the moving average's window in bins (odd); 0 means 5.
	Window int
	// Raw also draws the raw samples under each smoothed curve.
	Raw bool
	// Channels are drawn against time since each pull's tip-in, one panel
	// each. Check them with CheckChannels first.
	Channels []string
	// Trigger holds the pull trigger's thresholds; the zero value is the
	// daemon's.
	Trigger derive.PullTrigger
}

func (c Config) bin() float64 {
	if c.BinRPM > 0 {
		return c.BinRPM
	}
	return 50
}

func (c Config) window() int {
	if c.Window > 0 {
		return c.Window | 1
	}
	return 5
}

func (c Config) open() float64 {
	if c.Trigger.OpenThrottle > 0 {
		return c.Trigger.OpenThrottle
	}
	return 0.9 // derive.PullTrigger's default
}

// Run is one recorded run as the sheet shows it.
type Run struct {
	ID, Label, Vehicle string
	Start              time.Time
	// Conditions are the run's ambient conditions and their source: from
	// run.json, else the summary's means of the sensors.
	Conditions *record.Conditions
	// Correction names the standard and any entered conditions.
	Correction *record.Correction
	// Factor is the mean correction factor over the pulls; NaN when the
	// run did not record one.
	Factor float64
	Pulls  []Pull
}

// Pull is one wide-open-throttle pull of a run.
type Pull struct {
	Label string    // the run's label, with "pull k" when the run has several
	TipIn time.Time // when the throttle opened past the trigger's threshold
	// Power and Torque are corrected power (W) and corrected torque (N·m,
	// corrected power over angular speed) against engine speed; Boost (Pa)
	// and Lambda likewise; all at wide-open throttle.
	Power, Torque, Boost, Lambda []XY
	// Time holds Config.Channels against seconds since TipIn, to the
	// pull's end.
	Time map[string][]XY
}

// The quantities drawn against engine speed, by the channel whose display
// scale they take.
const (
	chPower  = "corrected_power"
	chTorque = "dyno_torque"
	chBoost  = "boost_pressure"
	chLambda = "lambda"
)

// Load reads the run at dir (a run directory, or a bare line-protocol file
// when files is given with dir ""), with its run.json and summary.json when
// present, and builds its pulls.
func Load(cfg Config, name, dir string, files []string) (Run, error) {
	var meta record.Meta
	var sum record.Summary
	if dir != "" {
		if err := readJSON(filepath.Join(dir, "run.json"), &meta); err != nil {
			return Run{}, err
		}
		if err := readJSON(filepath.Join(dir, "summary.json"), &sum); err != nil {
			return Run{}, err
		}
	}
	rec, err := record.ReadAll(files)
	if err != nil {
		return Run{}, fmt.Errorf("sheet: %w", err)
	}
	r := cfg.Build(meta, rec)
	if r.Label == "" {
		r.Label = name
		r.relabel()
	}
	if r.Conditions == nil {
		r.Conditions = sum.Conditions
	}
	if r.Correction == nil {
		r.Correction = sum.Correction
	}
	return r, nil
}

// Open loads the runs named (run directories, run ids under dir, or
// line-protocol files), each labelled by its run.json label, else its id,
// else the name given, and checks that every channel of c.Channels was
// recorded during a pull (an *UnknownChannelError if not).
func (c Config) Open(names []string, dir string) ([]Run, error) {
	var runs []Run
	for _, name := range names {
		input, err := replay.Resolve(name, dir)
		if err != nil {
			return nil, err
		}
		r, err := Load(c, filepath.Base(name), input.RunDir, input.Files)
		if err != nil {
			return nil, err
		}
		runs = append(runs, r)
	}
	return runs, c.CheckRecorded(runs)
}

// Check refuses a configuration a person got wrong: a channel the
// catalogue lacks (an *UnknownChannelError), a negative window or bin.
func (c Config) Check() error {
	if c.Window < 0 || c.BinRPM < 0 {
		return fmt.Errorf("the smoothing window (%d bins) and the bin width (%g rpm) cannot be negative", c.Window, c.BinRPM)
	}
	return CheckChannels(c.Channels)
}

// readJSON decodes a JSON file into v; a missing file leaves v as it is.
func readJSON(path string, v any) error {
	b, err := os.ReadFile(path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err == nil {
		err = json.Unmarshal(b, v)
	}
	if err != nil {
		return fmt.Errorf("sheet: %w", err)
	}
	return nil
}

// relabel names the pulls after the run's label.
func (r *Run) relabel() {
	for k := range r.Pulls {
		r.Pulls[k].Label = r.Label
		if len(r.Pulls) > 1 {
			r.Pulls[k].Label = fmt.Sprintf("%s · pull %d", r.Label, k+1)
		}
	}
}

// Build finds the pulls of rec (read with record.ReadAll: power, boost and
// λ are derived channels) by feeding derive.PullTrigger the throttle and
// engine speed as the daemon does, and gathers each pull's traces from its
// tip-in: against engine speed while the throttle stays open, against time
// to the trigger's end of the pull. meta labels the run (its label, else
// its id).
func (c Config) Build(meta record.Meta, rec record.Recording) Run {
	r := Run{ID: meta.ID, Label: meta.Label, Vehicle: meta.Vehicle, Start: meta.Start,
		Conditions: meta.Conditions, Correction: meta.Correction, Factor: math.NaN()}
	if r.Label == "" {
		r.Label = meta.ID
	}
	want := map[string]bool{}
	for _, ch := range c.Channels {
		want[ch] = true
	}
	trig := c.Trigger
	var (
		thr, rpm      = math.NaN(), math.NaN()
		cur           *Pull // the pull being gathered: pending until the trigger starts it
		inPull        bool
		cfSum         float64
		cfN           int
		first         = true
		lastThrOpened bool
	)
	for _, p := range rec.Points {
		t := time.Unix(0, p.NS).UTC()
		if first && r.Start.IsZero() {
			r.Start = t
		}
		first = false
		name := rec.Channel(p)
		ok := p.Quality == pipeline.OK
		if ok && (name == "throttle_position" || name == "engine_speed") {
			if name == "throttle_position" {
				thr = p.Value
			} else {
				rpm = p.Value
			}
			opened := thr >= c.open()
			if opened && !lastThrOpened && !inPull {
				cur = &Pull{TipIn: t, Time: map[string][]XY{}}
			}
			if !opened && !inPull {
				cur = nil
			}
			lastThrOpened = opened
			if !math.IsNaN(thr) && !math.IsNaN(rpm) {
				start, end := trig.Update(t, thr, rpm)
				switch {
				case start && cur != nil:
					inPull = true
					r.Pulls = append(r.Pulls, *cur)
					cur = &r.Pulls[len(r.Pulls)-1]
				case end:
					inPull, cur = false, nil
				}
			}
		}
		if cur == nil || !p.Quality.Usable() {
			continue
		}
		if want[name] {
			cur.Time[name] = append(cur.Time[name], XY{t.Sub(cur.TipIn).Seconds(), p.Value})
		}
		if !(thr >= c.open()) || math.IsNaN(rpm) || rpm <= 0 {
			continue
		}
		switch name {
		case chPower:
			cur.Power = append(cur.Power, XY{rpm, p.Value})
			cur.Torque = append(cur.Torque, XY{rpm, p.Value / (rpm * 2 * math.Pi / 60)})
		case chBoost:
			cur.Boost = append(cur.Boost, XY{rpm, p.Value})
		case chLambda:
			cur.Lambda = append(cur.Lambda, XY{rpm, p.Value})
		case "correction_factor":
			if inPull {
				cfSum += p.Value
				cfN++
			}
		}
	}
	if cfN > 0 {
		r.Factor = cfSum / float64(cfN)
	}
	r.relabel()
	return r
}

// PullPeaks are one pull's peaks of corrected power and torque: from the
// smoothed curve the sheet draws, and from the raw samples.
type PullPeaks struct {
	Power, Torque, RawPower, RawTorque Peak
}

// Peaks returns the pull's peaks as cfg smooths them.
func (c Config) Peaks(p Pull) PullPeaks {
	return PullPeaks{
		Power:     PeakOf(Smoothed(p.Power, c.bin(), c.window())),
		Torque:    PeakOf(Smoothed(p.Torque, c.bin(), c.window())),
		RawPower:  PeakOf(p.Power),
		RawTorque: PeakOf(p.Torque),
	}
}

// UnknownChannelError is a channel the catalogue lacks, or one no run
// recorded.
type UnknownChannelError struct {
	Name   string
	Reason string
}

// Error says which channel and why.
func (e *UnknownChannelError) Error() string {
	return fmt.Sprintf("channel %q %s", e.Name, e.Reason)
}

// CheckChannels refuses a channel the catalogue lacks, naming it.
func CheckChannels(names []string) error {
	for _, n := range names {
		if _, ok := pipeline.Catalogued(n); !ok {
			return &UnknownChannelError{Name: n, Reason: "is not in the channel catalogue, so the sheet cannot draw it"}
		}
	}
	return nil
}

// CheckRecorded refuses a channel of cfg.Channels that no pull of runs
// holds a sample of.
func (c Config) CheckRecorded(runs []Run) error {
	for _, n := range c.Channels {
		found := false
		for _, r := range runs {
			for _, p := range r.Pulls {
				found = found || len(p.Time[n]) > 0
			}
		}
		if !found {
			return &UnknownChannelError{Name: n, Reason: "was not recorded during any pull of these runs"}
		}
	}
	return nil
}
