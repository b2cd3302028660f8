package main

import (
	"path/filepath"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/derived"
)

// derivedConfig converts the engine, power, turbo and warning sections of
// cfg into pipeline/derived's configuration, in canonical units.
func derivedConfig(cfg *config.Config) derived.Config {
	e := cfg.Engine
	dc := derived.Config{
		Displacement:  e.DisplacementL / 1000,
		VE:            e.VE,
		Baro:          e.BaroKPa * 1000,
		Wideband:      derive.Wideband{VoltsLow: e.Wideband.VoltsLow, LambdaLow: e.Wideband.LambdaLow, VoltsHigh: e.Wideband.VoltsHigh, LambdaHigh: e.Wideband.LambdaHigh},
		Fuel:          e.Fuel,
		PowerStandard: cfg.Power.Standard,
		Turbo: derived.Turbo{
			TargetBoost: cfg.Turbo.TargetBoostKPa * 1000,
			FilterDrop:  cfg.Turbo.FilterDropKPa * 1000,
			WarmOil:     cfg.Turbo.WarmOilC,
			CoolDownTau: time.Duration(cfg.Turbo.CoolDownTau),
		},
	}
	if t := e.VETable; t != nil {
		tb := &derive.VETable{Speeds: t.SpeedsRPM, Values: t.Values}
		for _, p := range t.PressuresKPa {
			tb.Pressures = append(tb.Pressures, p*1000)
		}
		dc.VETable = tb
	}
	if cfg.StateDir != "" {
		dc.Turbo.StatePath = filepath.Join(cfg.StateDir, "turbo-"+cfg.Vehicle+".json")
	}
	for _, r := range cfg.Warnings {
		dc.Warnings = append(dc.Warnings, warn.Text{Name: r.Name, Rule: r.Rule})
	}
	return dc
}

// buildAll returns the derivations and then the detectors for cfg over the
// channels registered in reg, and the set they belong to (the VE table's
// handler, the turbo state, the built-in rules left out). A configured
// warning rule on a channel reg lacks is an error.
func buildAll(cfg *config.Config, reg *pipeline.Registry) ([]pipeline.Derivation, *derived.Set, error) {
	return buildDerived(cfg, reg, false)
}

// buildDerived is buildAll; lenientRules leaves out configured rules on
// absent channels too, for replaying a recording that lacks them.
func buildDerived(cfg *config.Config, reg *pipeline.Registry, lenientRules bool) ([]pipeline.Derivation, *derived.Set, error) {
	dc := derivedConfig(cfg)
	dc.LenientRules = lenientRules
	set, err := derived.Build(dc, reg)
	if err != nil {
		return nil, nil, buildError(cfg, err)
	}
	return set.Derivations, set, nil
}
