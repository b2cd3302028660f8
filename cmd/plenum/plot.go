package main

import (
	"fmt"
	"io"
	"path/filepath"
	"strings"

	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/plot"
	"github.com/plenum-engine/plenum/pipeline/replay"
)

// cmdPlot draws corrected power and torque against engine speed, boost and
// lambda against engine speed, and any channels against time, for one run or
// several overlaid.
func cmdPlot(args []string, stdout io.Writer) error {
	fs := newFlagSet("plot", "-in RUN[,RUN…] -out FILE.png|FILE.svg [flags]", "Draws corrected power and torque, boost and lambda against engine speed, and\nchosen channels against time, for one run or several overlaid.", stdout)
	in := fs.String("in", "", "comma-separated runs: run directories, ids under -dir, or line-protocol files")
	dir := fs.String("dir", "", "the recording directory that holds run ids")
	out := fs.String("out", "", "output file, .png or .svg")
	chans := fs.String("channels", "", "also plot these channels against time (comma-separated)")
	units := fs.String("units", "", "units for people, e.g. pressure=bar,temperature=F,power=hp_mech,mixture=afr (default metric: kPa, °C, kW, λ)")
	fuel := fs.String("fuel", "gasoline", "the fuel whose stoichiometric ratio mixture=afr uses")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *in == "" || *out == "" {
		return usageError{"plot needs -in RUN[,RUN…] and -out FILE.png|FILE.svg"}
	}
	if _, ok := plot.FormatOf(*out); !ok {
		return usageError{"plot -out must end in .png or .svg"}
	}
	u, err := display.ParseUnits(*units)
	if err != nil {
		return usageError{err.Error()}
	}
	shown, err := display.New(display.Config{Units: u, Fuel: *fuel})
	if err != nil {
		return usageError{err.Error()}
	}
	cfg := plot.Config{Unit: plot.CatalogueUnit, Display: plot.DisplayScale(shown)}
	if *chans != "" {
		cfg.Channels = strings.Split(*chans, ",")
	}
	var runs []plot.Series
	for _, name := range strings.Split(*in, ",") {
		input, err := replay.Resolve(name, *dir)
		if err != nil {
			return err
		}
		rec, err := input.ReadAll()
		if err != nil {
			return err
		}
		label := filepath.Base(name)
		if input.RunDir != "" {
			label = filepath.Base(input.RunDir)
		}
		runs = append(runs, cfg.Align(label, rec))
	}
	panels, err := plot.Save(*out, cfg, runs)
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "wrote %s (%d runs, %d panels)\n", *out, len(runs), panels)
	return nil
}
