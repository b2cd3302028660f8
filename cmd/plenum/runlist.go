package main

import (
	"fmt"
	"io"
	"strings"

	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/runlist"
)

// unitFlags adds -units and -fuel to fs; the returned function builds the
// formatter they choose; dflt says what is shown without -units.
func unitFlags(fs *cmdFlags, dflt string) func() (display.Formatter, error) {
	units := fs.String("units", "", "units for people, e.g. pressure=bar,temperature=F,power=hp_mech,mixture=afr (default "+dflt+")")
	fuel := fs.String("fuel", "gasoline", "the fuel whose stoichiometric ratio mixture=afr uses")
	return func() (display.Formatter, error) {
		f, err := display.Parse(*units, *fuel)
		if err != nil {
			return f, usageError{err.Error()}
		}
		return f, nil
	}
}

// metric is the display layer's default, for the usage.
const metric = "metric: kPa, °C, kW, N·m, λ"

// cmdRuns lists the recorded runs of a directory.
func cmdRuns(args []string, stdout io.Writer) error {
	fs := newFlagSet("runs", "-dir DIR [flags]", "Lists the runs recorded under DIR, oldest first: label, vehicle, start, length,\nhow each ended, peak corrected power and torque, standard and warnings.", stdout)
	dir := fs.String("dir", "", "the recording directory")
	var f runlist.Filter
	f.Flags(fs.FlagSet)
	shown := unitFlags(fs, metric)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *dir == "" {
		return usageError{"runs needs -dir DIR"}
	}
	form, err := shown()
	if err != nil {
		return err
	}
	runs, err := runlist.List(runlist.Config{Dir: *dir}, f)
	if err != nil {
		return fmt.Errorf("runs: %w", err)
	}
	return runlist.WriteList(stdout, runs, form)
}

// cmdShow prints one run's summary for a person.
func cmdShow(args []string, stdout io.Writer) error {
	fs := newFlagSet("show", "RUN [flags]", "Prints one run's summary: notes, conditions and their source, the correction\nstandard and factor, peaks, turbo-lag measurements and warnings. RUN is a run\ndirectory, or a run id with -dir.", stdout)
	dir := fs.String("dir", "", "the recording directory that holds run ids")
	shown := unitFlags(fs, metric)
	// RUN comes before the flags or after them (each of which takes a value).
	var name string
	if n := len(args); n > 0 && !strings.HasPrefix(args[0], "-") {
		name, args = args[0], args[1:]
	} else if n > 0 && !strings.HasPrefix(args[n-1], "-") && (n == 1 || !strings.HasPrefix(args[n-2], "-") || strings.Contains(args[n-2], "=")) {
		name, args = args[n-1], args[:n-1]
	}
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if name == "" {
		return usageError{"show needs RUN: a run directory, or a run id with -dir"}
	}
	form, err := shown()
	if err != nil {
		return err
	}
	r, err := runlist.Open(runlist.Config{Dir: *dir}, name)
	if err != nil {
		return fmt.Errorf("show: %w", err)
	}
	return runlist.WriteShow(stdout, r, form)
}
