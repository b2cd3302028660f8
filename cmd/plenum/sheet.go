package main

import (
	"errors"
	"fmt"
	"io"
	"strings"

	"github.com/plenum-engine/plenum/pipeline/sheet"
)

// cmdSheet draws the dyno sheet of one run or several overlaid.
func cmdSheet(args []string, stdout io.Writer) error {
	fs := newFlagSet("sheet", "-in RUN[,RUN…] -out FILE.png|FILE.svg [flags]", "Draws the dyno sheet: corrected power and torque, boost and λ against engine speed,\nchosen channels against time since each pull's tip-in, a header and each pull's peaks.", stdout)
	in := fs.String("in", "", "comma-separated runs: run directories, ids under -dir, or line-protocol files")
	dir := fs.String("dir", "", "the recording directory that holds run ids")
	out := fs.String("out", "", "output file, .png or .svg")
	chans := fs.String("channels", "", "also draw these channels against time since tip-in (comma-separated)")
	shown := unitFlags(fs, "kW, N·m, kPa, λ")
	window := fs.Int("smooth", 5, "moving-average window, in engine-speed bins (odd; 1: none)")
	bin := fs.Float64("bin", 50, "engine-speed bin width (rpm)")
	raw := fs.Bool("raw", false, "also draw the raw samples under the smoothed curves")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *in == "" || *out == "" {
		return usageError{"sheet needs -in RUN[,RUN…] and -out FILE.png|FILE.svg"}
	}
	if _, ok := sheet.FormatOf(*out); !ok {
		return usageError{"sheet -out must end in .png or .svg"}
	}
	people, err := shown()
	if err != nil {
		return err
	}
	cfg := sheet.Config{Display: people, Window: *window, BinRPM: *bin, Raw: *raw}
	if *chans != "" {
		cfg.Channels = strings.Split(*chans, ",")
	}
	if err := cfg.Check(); err != nil {
		return usageError{"sheet: " + err.Error() + "."}
	}
	runs, err := cfg.Open(strings.Split(*in, ","), *dir)
	var unk *sheet.UnknownChannelError
	if errors.As(err, &unk) {
		return usageError{"sheet -channels: " + err.Error() + "."}
	} else if err != nil {
		return err
	}
	if err := sheet.Save(*out, cfg, runs); err != nil {
		return err
	}
	for _, row := range sheet.Rows(cfg, runs)[1:] {
		fmt.Fprintf(stdout, "%s: %s (raw %s), %s (raw %s)\n", row[0], row[1], row[2], row[3], row[4])
	}
	fmt.Fprintf(stdout, "wrote %s (%d runs)\n", *out, len(runs))
	return nil
}
