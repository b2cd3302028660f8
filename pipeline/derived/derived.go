// Package derived provides the derived channels and the detectors: adapters
// that wire derive/'s pure physics and derive/lag, derive/warn and
// derive/turbo into the pipeline's derivation graph. Build chooses the
// adapters the registered channels allow. Each adapter declares what it
// reads and writes; Derive does not allocate (events aside).
package derived

import (
	"errors"
	"fmt"
	"net/http"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/lag"
	"github.com/plenum-engine/plenum/derive/turbo"
	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/pipeline"
)

// Config describes the engine and the detectors, in canonical units. Each
// field's zero value means its default (see the field); only Displacement
// and VE or VETable have none, and air flow is zero without them.
type Config struct {
	// Displacement is the engine's swept volume, m³.
	Displacement float64
	// VE is the volumetric efficiency (ratio) when VETable is nil.
	VE float64
	// VETable, when set, gives the volumetric efficiency over engine speed
	// (rpm) and manifold pressure (Pa). Its axes are also the cells of the
	// measured-VE table served as CSV.
	VETable *derive.VETable
	// Baro is the barometric pressure (Pa) used while no barometric channel
	// is fresh; 0 means derive.StdPressure.
	Baro float64
	// Wideband is the wideband controller's output line; the zero value
	// means there is none and λ is not derived.
	Wideband derive.Wideband
	// Fuel names the fuel (one of derive.FuelNames); "" means gasoline.
	Fuel string
	// PowerStandard names the power correction standard (derive.ParseStandard);
	// "" means sae_j1349.
	PowerStandard string
	// Turbo configures the turbo detectors.
	Turbo Turbo
	// Warnings replace built-in rules of the same name (warn.Off disables
	// one) or add rules (warn.Merge over warn.Builtin). A built-in rule on
	// a channel the setup lacks is left out (Set.LeftOut); a rule of
	// Warnings on such a channel makes Build fail with a *RuleChannelError.
	Warnings []warn.Text
	// LenientRules leaves out rules of Warnings on absent channels as well,
	// listing them in Set.LeftOut: for replaying a recording that lacks
	// channels the configuration has.
	LenientRules bool
}

// Turbo configures the turbo lag detector and the turbo guard.
type Turbo struct {
	// TargetBoost is the boost (Pa) lag events measure toward; 0: the
	// settled level.
	TargetBoost float64
	// FilterDrop is the air filter's pressure loss (Pa) before the compressor.
	FilterDrop float64
	// WarmOil is the oil temperature (°C) that ends the warm-up guard; 0:
	// derive/turbo's default.
	WarmOil float64
	// CoolDownTau is the turbo's thermal time constant; 0: derive/turbo's
	// default.
	CoolDownTau time.Duration
	// StatePath is the file the cool-down state is saved to and restored
	// from (Set.SaveTurboState, Set.LoadTurboState); "" keeps no state.
	StatePath string
}

// Set is what Build made: the derivations and detectors, and handles on the
// parts the binary serves or persists.
type Set struct {
	// Derivations holds the derivations, then the detectors, ready for
	// pipeline.BuildGraph.
	Derivations []pipeline.Derivation
	// LeftOut lists the warning rules left out for want of channels, in
	// the order of the rules; the binary names each in one info line.
	LeftOut []LeftOut
	// Rules lists the warning rules in use (built-in and configured), for
	// the metrics' rule and severity labels.
	Rules []WarningRule

	ve    *veEstimate
	guard *turboGuard
	warn  *warnings
	power *power
}

// EnterConditions makes the power correction use conditions entered for a
// run (read off a weather station) instead of the ambient channels: a
// field of e that is not NaN wins; a NaN field leaves the ambient channel,
// or the default, in use. A nil e goes back to the ambient channels. It
// returns the name of the standard power is corrected to, or "" when this
// setup derives no power. Safe for concurrent use with the pipeline.
func (s *Set) EnterConditions(e *derive.Ambient) string {
	if s.power == nil {
		return ""
	}
	if e != nil {
		x := *e
		e = &x
	}
	s.power.entered.Store(e)
	return s.power.std.String()
}

// Acknowledge acknowledges a raised warning: a latched one (such as
// switched_off_hot) whose condition has gone clears at the next sample,
// and a warning_acknowledged event, tagged with a.Via and a.By, records it.
// It returns ErrNoWarning for a rule this setup does not evaluate and
// ErrNotRaised for one that is not raised. Safe for concurrent use with
// the pipeline.
func (s *Set) Acknowledge(a Ack) error {
	if s.warn == nil {
		return fmt.Errorf("%w: %q (this setup evaluates no warnings)", ErrNoWarning, a.Rule)
	}
	return s.warn.acknowledge(a)
}

// VETableHandler returns the handler that writes the measured-VE table as
// CSV (served at /ve-table.csv), or nil when the channels it needs are not
// registered.
func (s *Set) VETableHandler() http.Handler {
	if s.ve == nil {
		return nil
	}
	return s.ve
}

// ErrStateDir marks a LoadTurboState failure to create the state file's
// directory: the cool-down state will not be saved either.
var ErrStateDir = errors.New("turbo state directory")

// LoadTurboState creates the state file's directory and restores a saved
// cool-down state, cooled for the time it was off (now minus the time it
// was saved). A missing file is no error. It does nothing without a turbo
// guard or a Turbo.StatePath.
func (s *Set) LoadTurboState(now time.Time) error {
	if s.guard == nil || s.guard.stateFile == "" {
		return nil
	}
	return s.guard.load(now)
}

// SaveTurboState writes the cool-down state to Turbo.StatePath, so that a
// restart keeps it. It does nothing without a turbo guard or a state path.
func (s *Set) SaveTurboState() error {
	if s.guard == nil {
		return nil
	}
	return s.guard.save()
}

// Build returns the derivations and detectors cfg and the channels
// registered in reg allow, in the order pipeline.BuildGraph gets them.
// It registers nothing itself.
func Build(cfg Config, reg *pipeline.Registry) (*Set, error) {
	s := &Set{}
	if err := s.buildDerivations(cfg, reg); err != nil {
		return nil, err
	}
	made := map[string]bool{}
	for _, d := range s.Derivations {
		for _, c := range d.Outputs() {
			made[c.Name] = true
		}
	}
	if err := s.buildDetectors(cfg, reg, made); err != nil {
		return nil, err
	}
	return s, nil
}

func (cfg *Config) baro() float64 {
	if cfg.Baro == 0 {
		return derive.StdPressure
	}
	return cfg.Baro
}

// buildDerivations appends the physics the registered channels allow.
func (s *Set) buildDerivations(cfg Config, reg *pipeline.Registry) error {
	has := func(names ...string) bool {
		for _, n := range names {
			if _, ok := reg.Lookup(n); !ok {
				return false
			}
		}
		return true
	}
	baro := cfg.baro()
	fuelName := cfg.Fuel
	if fuelName == "" {
		fuelName = "gasoline"
	}
	fuel, err := derive.LookupFuel(fuelName)
	if err != nil {
		return fmt.Errorf("fuel: %w", err)
	}
	if has("manifold_pressure", "intake_air_temp", "engine_speed") {
		if cfg.VETable != nil {
			if err := cfg.VETable.Validate(); err != nil {
				return fmt.Errorf("ve table: %w", err)
			}
		}
		s.Derivations = append(s.Derivations, &airflow{displacement: cfg.Displacement, ve: cfg.VE, table: cfg.VETable})
	}
	if has("manifold_pressure") {
		s.Derivations = append(s.Derivations, &boost{baro: baro})
	}
	if has("wideband_voltage") && cfg.Wideband != (derive.Wideband{}) {
		s.Derivations = append(s.Derivations, &mixture{wb: cfg.Wideband, stoich: fuel.Stoich})
		if has("manifold_pressure", "intake_air_temp", "engine_speed") {
			s.Derivations = append(s.Derivations, &fuelFlow{fuel: fuel})
		}
	}
	if has("compressor_outlet_pressure") {
		s.Derivations = append(s.Derivations, &compressorRatio{baro: baro})
	}
	if has("ecu_mass_air_flow", "manifold_pressure", "intake_air_temp", "engine_speed") {
		ve, err := newVEEstimate(cfg.Displacement, cfg.VETable)
		if err != nil {
			return err
		}
		s.ve = ve
		s.Derivations = append(s.Derivations, ve)
	}
	if has("wideband_voltage", "ecu_commanded_lambda") && cfg.Wideband != (derive.Wideband{}) {
		s.Derivations = append(s.Derivations, lambdaError{})
	}
	return nil
}

// buildDetectors appends the detectors the registered channels and the
// derived channels made allow. made is extended by the turbo guard's outputs
// that warning rules read.
func (s *Set) buildDetectors(cfg Config, reg *pipeline.Registry, made map[string]bool) error {
	has := func(n string) bool {
		_, ok := reg.Lookup(n)
		return ok || made[n]
	}
	baro := cfg.baro()
	if has("dyno_torque") && has("engine_speed") {
		name := cfg.PowerStandard
		if name == "" {
			name = "sae_j1349"
		}
		std, err := derive.ParseStandard(name)
		if err != nil {
			return fmt.Errorf("power standard: %w", err)
		}
		s.power = &power{std: std, amb: derive.Ambient{Pressure: baro, Temperature: 25, Humidity: 0}}
		s.Derivations = append(s.Derivations, s.power)
	}
	if has("compressor_outlet_pressure") && has("charge_temp_pre_cooler") && has("ambient_temp") {
		s.Derivations = append(s.Derivations, &chargeAir{ref: derive.StandardDay(), baro: baro, filterDrop: cfg.Turbo.FilterDrop})
	}
	if has("throttle_position") && has("boost_pressure") && has("engine_speed") {
		det, err := lag.NewDetector(lag.Config{Target: cfg.Turbo.TargetBoost})
		if err != nil {
			return fmt.Errorf("turbo lag: %w", err)
		}
		s.Derivations = append(s.Derivations, &lagDetector{det: det})
	}
	if has("engine_speed") {
		wu, err := turbo.NewWarmUp(turbo.WarmUpConfig{OilTemp: cfg.Turbo.WarmOil})
		if err != nil {
			return fmt.Errorf("turbo warm-up: %w", err)
		}
		cd, err := turbo.NewCoolDown(turbo.CoolDownConfig{Tau: cfg.Turbo.CoolDownTau})
		if err != nil {
			return fmt.Errorf("turbo cool-down: %w", err)
		}
		s.guard = &turboGuard{warm: wu, cool: cd, stateFile: cfg.Turbo.StatePath}
		s.Derivations = append(s.Derivations, s.guard)
		made["turbo_warmup_warning"], made["turbo_shutdown_hot"] = true, true
	}
	w, leftOut, err := newWarnings(cfg.Warnings, has, cfg.LenientRules)
	if err != nil {
		return err
	}
	s.LeftOut = leftOut
	if w != nil {
		s.warn = w
		s.Derivations = append(s.Derivations, w)
		s.Rules = w.rules()
	}
	return nil
}
