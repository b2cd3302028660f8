package main

import (
	"fmt"
	"io"
	"path/filepath"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/replay"
)

// cmdReplay feeds a recorded run through the derivations and detectors of a
// configuration (by default the one recorded with the run) and writes the
// result as line protocol, or as CSV with -csv.
func cmdReplay(args []string, stdout io.Writer) error {
	fs := newFlagSet("replay", "-in RUN [flags]", "Feeds a recorded run through the derivations and detectors of a configuration\n(by default the run's own) and writes the result as line protocol or CSV.", stdout)
	cfgPath := fs.String("config", "", "configuration to replay with (default: the run's own config.yaml)")
	in := fs.String("in", "", "a run directory, a run id under -dir, or a line-protocol file")
	dir := fs.String("dir", "", "the recording directory that holds run ids")
	out := fs.String("out", "", "output file (default: standard output)")
	asCSV := fs.Bool("csv", false, "write a wide CSV table (a row per frame time, a column per channel, units in the header) instead of line protocol")
	events := fs.String("events", "", "also write the replayed events to this CSV file")
	sumPath := fs.String("summary", "", "also write the replayed run's summary (JSON) to this file")
	shown := unitFlags(fs, "canonical SI units with every digit")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *in == "" {
		return usageError{"replay needs -in RUN"}
	}
	input, err := replay.Resolve(*in, *dir)
	if err != nil {
		return err
	}
	var cfg *config.Config
	used := *cfgPath
	switch {
	case *cfgPath != "":
		cfg, err = config.Load(*cfgPath)
	case input.RunDir != "":
		used = "the run's own"
		cfg, err = config.Load(filepath.Join(input.RunDir, "config.yaml"))
	default:
		return usageError{"replay of a bare file needs -config FILE"}
	}
	if err != nil {
		return err
	}
	rc := replay.Config{
		Pipeline: func(reg *pipeline.Registry) (*pipeline.Pipeline, error) { return offlinePipeline(cfg, reg) },
		Vehicle:  cfg.Vehicle, Run: replay.RunID(input), Of: replay.OriginalID(input), ConfigUsed: used,
		CSV: *asCSV, Events: *events, Out: *out, Summary: *sumPath,
	}
	if fs.Lookup("units").Value.String() != "" {
		f, err := shown()
		if err != nil {
			return err
		}
		rc.Display = &f
	}
	rec, err := input.ReadInputs()
	if err != nil {
		return err
	}
	_, err = replay.Run(rc, rec, stdout)
	return err
}

// offlinePipeline builds cfg's derivations and detectors over reg for use
// away from the car (replay, benchmarks): the live turbo state is neither
// read nor written. Feed it with Process or ProcessFrame.
func offlinePipeline(cfg *config.Config, reg *pipeline.Registry) (*pipeline.Pipeline, error) {
	c := *cfg
	c.StateDir = ""
	ds, _, err := buildDerived(&c, reg, true)
	if err != nil {
		return nil, err
	}
	g, err := pipeline.BuildGraph(reg, ds)
	if err != nil {
		return nil, fmt.Errorf("replay: %w", err)
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	p.BindEmitters()
	return p, nil
}
