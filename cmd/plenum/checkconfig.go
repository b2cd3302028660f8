package main

import (
	"context"
	"log/slog"
	"strings"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/derived"
)

// checkReport is what checkConfig found that is no error: the built-in
// rules left out, and the files named that do not exist on this machine.
type checkReport struct {
	LeftOut  []derived.LeftOut
	Absent   []string
	Channels []pipeline.Channel // every channel the daemon would write
}

// checkConfig builds every part run builds from cfg, opening nothing (see
// build). A file the configuration names that does not exist here (check
// run on another machine than the daemon's) is not read but named in the
// report; one that exists is read as run reads it.
func checkConfig(cfg *config.Config) (checkReport, error) {
	c, absent := cfg.WithoutAbsentFiles()
	rep := checkReport{Absent: absent}
	d, err := build(context.Background(), c, slog.New(slog.DiscardHandler), false)
	if err != nil {
		return rep, err
	}
	d.close()
	rep.LeftOut, rep.Channels = d.set.LeftOut, d.reg.Channels()
	return rep, nil
}

// logLeftOut names, in one info line each, the built-in warning rules left
// out because the setup lacks channels they read.
func logLeftOut(log *slog.Logger, leftOut []derived.LeftOut) {
	for _, r := range leftOut {
		log.Info("built-in warning rule left out: this setup neither measures nor derives the channels it reads", "rule", r.Rule, "missing", strings.Join(r.Missing, ","))
	}
}
