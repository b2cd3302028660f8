package main

import (
	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/derived"
)

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
	dc := cfg.Derived()
	dc.LenientRules = lenientRules
	set, err := derived.Build(dc, reg)
	if err != nil {
		return nil, nil, cfg.DerivedError(err)
	}
	return set.Derivations, set, nil
}
