package main

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/lag"
	"github.com/plenum-engine/plenum/derive/turbo"
	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/pipeline"
)

// emitter is embedded by derivations that emit events.
type emitter struct{ emit func(pipeline.Event) }

// SetEmitter receives the pipeline's event fan-out.
func (e *emitter) SetEmitter(f func(pipeline.Event)) { e.emit = f }

func (e *emitter) send(ev pipeline.Event) {
	if e.emit != nil {
		e.emit(ev)
	}
}

// lagDetector wraps derive/lag: tip-ins and the boost response after them.
type lagDetector struct {
	emitter
	det *lag.Detector
}

func (d *lagDetector) Name() string { return "turbo_lag" }
func (d *lagDetector) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "throttle_position"}, {Name: "boost_pressure"}, {Name: "engine_speed"}, {Name: "gear", Optional: true}}
}
func (d *lagDetector) Outputs() []pipeline.Channel { return nil }
func (d *lagDetector) Derive(t time.Time, in, _ []float64) uint64 {
	gear := 0
	if !math.IsNaN(in[3]) {
		gear = int(math.Round(in[3]))
	}
	ev, ok := d.det.Update(t, in[0], in[1], in[2], gear)
	if !ok {
		return 0
	}
	kind := "turbo_lag"
	tags := map[string]string{"gear": strconv.Itoa(ev.Gear)}
	if ev.Discarded {
		kind = "turbo_lag_discarded"
		tags["reason"] = ev.Reason
	}
	d.send(pipeline.Event{Kind: kind, Name: "boost_response", Start: ev.Start, End: ev.End, Tags: tags,
		Fields: map[string]float64{
			"engine_speed_rpm": ev.RPM, "boost_start_pascals": ev.Initial, "boost_final_pascals": ev.Final,
			"t10_seconds": ev.T10, "t50_seconds": ev.T50, "t90_seconds": ev.T90, "rise_seconds": ev.Rise,
			"overshoot_ratio": ev.Overshoot, "settling_seconds": ev.Settling,
		}})
	return 0
}

// warnings wraps derive/warn: rule evaluation with durations and hysteresis.
// It feeds the engine only the inputs that changed, then lets timers run.
type warnings struct {
	emitter
	eng     *warn.Engine
	names   []string
	chIdx   []int
	last    []float64
	trans   []warn.Transition
	active  []float64
	lastAll time.Time
}

func (w *warnings) Name() string { return "warnings" }
func (w *warnings) Inputs() []pipeline.Input {
	in := make([]pipeline.Input, len(w.names))
	for i, n := range w.names {
		in[i] = pipeline.Input{Name: n, Optional: true}
	}
	return in
}
func (w *warnings) Outputs() []pipeline.Channel {
	out := make([]pipeline.Channel, w.eng.Rules())
	for i := range out {
		name := w.ruleName(i)
		out[i] = pipeline.Channel{Name: "warning_" + name, Quantity: "warning_active", Unit: pipeline.None, Sensor: name, MaxAge: time.Hour}
	}
	return out
}

func (w *warnings) ruleName(i int) string { return w.eng.RuleName(i) }

func (w *warnings) Derive(t time.Time, in, out []float64) uint64 {
	w.trans = w.trans[:0]
	for i, v := range in {
		if math.IsNaN(v) || v == w.last[i] {
			continue
		}
		w.last[i] = v
		w.trans = w.eng.Update(w.chIdx[i], t, v, w.trans)
	}
	w.trans = w.eng.Advance(t, w.trans)
	var mask uint64
	for _, tr := range w.trans {
		kind := "warning_raised"
		v := 1.0
		switch tr.Kind {
		case warn.Cleared:
			kind, v = "warning_cleared", 0
		case warn.Acknowledged:
			kind = "warning_acknowledged"
		}
		w.active[tr.Rule] = v
		mask |= 1 << uint(tr.Rule)
		w.send(pipeline.Event{Kind: kind, Name: tr.Name, Start: tr.Since, End: tr.Time,
			Tags: map[string]string{"severity": tr.Severity.String()}, Fields: map[string]float64{"active": v}})
	}
	// Publish every rule's state once a second even without transitions, so
	// that the gauges stay fresh.
	for i := range w.active {
		out[i] = w.active[i]
	}
	if mask == 0 && t.Sub(w.lastAll) >= time.Second {
		mask = 1<<uint(len(w.active)) - 1
		w.lastAll = t
	}
	return mask
}

// turboGuard wraps derive/turbo: the warm-up guard and the cool-down timer.
type turboGuard struct {
	warm      *turbo.WarmUp
	cool      *turbo.CoolDown
	wasRun    bool
	stateFile string
}

func (d *turboGuard) Name() string { return "turbo_guard" }
func (d *turboGuard) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "engine_speed"}, {Name: "boost_pressure", Optional: true}, {Name: "oil_temp", Optional: true},
		{Name: "exhaust_temp", Optional: true}, {Name: "air_mass_flow", Optional: true}}
}
func (d *turboGuard) Outputs() []pipeline.Channel {
	return []pipeline.Channel{
		{Name: "turbo_warmup_warning", Quantity: "warmup_warning", Unit: pipeline.None, Sensor: "turbo_guard"},
		{Name: "turbo_thermal_state", Quantity: "temperature", Unit: pipeline.Celsius, Sensor: "turbo_thermal_model"},
		{Name: "cooldown_idle_remaining", Quantity: "cooldown_idle_remaining", Unit: pipeline.Seconds, Sensor: "turbo_guard"},
		{Name: "safe_to_switch_off", Quantity: "switch_off_safe", Unit: pipeline.None, Sensor: "turbo_guard"},
		{Name: "turbo_shutdown_hot", Quantity: "shutdown_hot", Unit: pipeline.None, Sensor: "turbo_guard", MaxAge: time.Hour},
	}
}
func (d *turboGuard) Derive(t time.Time, in, out []float64) uint64 {
	rpm, boost := in[0], in[1]
	if math.IsNaN(boost) {
		boost = 0
	}
	ws := d.warm.Update(t, rpm, boost, in[2])
	air := in[4] / 1000 // g/s → kg/s
	if math.IsNaN(air) {
		air = 0
	}
	cs := d.cool.Update(t, rpm, in[3], air)
	out[0] = b2f(ws.Warning)
	out[1] = cs.Temp
	out[2] = cs.IdleRemaining.Seconds()
	out[3] = b2f(cs.SafeToSwitchOff)
	// Switched off while the turbo was still hot: a latched advisory.
	if d.wasRun && !cs.Running {
		out[4] = b2f(!cs.SafeToSwitchOff)
	}
	if cs.Running {
		out[4] = 0
	}
	d.wasRun = cs.Running
	return 0b11111
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// save writes the cool-down state so that a restart keeps it.
func (d *turboGuard) save() error {
	if d.stateFile == "" {
		return nil
	}
	b, err := json.Marshal(d.cool.State())
	if err != nil {
		return err
	}
	tmp := d.stateFile + ".tmp"
	if err := os.WriteFile(tmp, b, 0o644); err != nil {
		return fmt.Errorf("turbo state: %w", err)
	}
	return os.Rename(tmp, d.stateFile)
}

// load restores a saved cool-down state, cooled for the time it was off.
func (d *turboGuard) load(now time.Time) error {
	b, err := os.ReadFile(d.stateFile)
	if err != nil {
		if os.IsNotExist(err) {
			return nil
		}
		return fmt.Errorf("turbo state: %w", err)
	}
	var st turbo.CoolDownState
	if err := json.Unmarshal(b, &st); err != nil {
		return fmt.Errorf("turbo state %s: %w", d.stateFile, err)
	}
	return d.cool.Restore(st, now)
}

// power computes observed and corrected power from a dyno torque channel.
type power struct {
	std derive.Standard
	amb derive.Ambient // used where ambient channels are missing
}

func (d *power) Name() string { return "power" }
func (d *power) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "dyno_torque"}, {Name: "engine_speed"}, {Name: "baro_pressure", Optional: true},
		{Name: "ambient_temp", Optional: true}, {Name: "ambient_humidity", Optional: true}, {Name: "fuel_mass_flow", Optional: true}}
}
func (d *power) Outputs() []pipeline.Channel {
	return []pipeline.Channel{
		{Name: "brake_power", Quantity: "power", Unit: pipeline.Watts, Sensor: "observed"},
		{Name: "corrected_power", Quantity: "power", Unit: pipeline.Watts, Sensor: "corrected_" + d.std.String()},
		{Name: "correction_factor", Quantity: "power_correction_factor", Unit: pipeline.Ratio, Sensor: d.std.String()},
		{Name: "bsfc", Quantity: "brake_specific_fuel_consumption", Unit: pipeline.GramsPerJoule, Sensor: "dyno"},
	}
}
func (d *power) Derive(_ time.Time, in, out []float64) uint64 {
	a := d.amb
	if !math.IsNaN(in[2]) {
		a.Pressure = in[2]
	}
	if !math.IsNaN(in[3]) {
		a.Temperature = in[3]
	}
	if !math.IsNaN(in[4]) {
		a.Humidity = in[4]
	}
	p := derive.PowerFromTorque(in[0], in[1])
	out[0] = p
	cf, err := d.std.Factor(a)
	if err != nil {
		return 1
	}
	out[1] = p * cf
	out[2] = cf
	mask := uint64(0b111)
	if !math.IsNaN(in[5]) && p > 1000 {
		out[3] = derive.BSFC(in[5]/1000, p) * 1000 // g/J, the Prometheus base units
		mask |= 0b1000
	}
	return mask
}

// chargeAir computes compressor efficiency, corrected compressor flow and
// intercooler effectiveness from the charge-air sensors that exist.
type chargeAir struct {
	ref        derive.FlowReference
	baro       float64
	filterDrop float64
}

func (d *chargeAir) Name() string { return "charge_air" }
func (d *chargeAir) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "compressor_outlet_pressure"}, {Name: "charge_temp_pre_cooler"}, {Name: "ambient_temp"},
		{Name: "compressor_inlet_pressure", Optional: true}, {Name: "baro_pressure", Optional: true},
		{Name: "intake_air_temp", Optional: true}, {Name: "air_mass_flow", Optional: true}}
}
func (d *chargeAir) Outputs() []pipeline.Channel {
	return []pipeline.Channel{
		{Name: "compressor_efficiency", Quantity: "compressor_efficiency", Unit: pipeline.Ratio, Sensor: "isentropic"},
		{Name: "corrected_compressor_flow", Quantity: "corrected_mass_flow", Unit: pipeline.GramsPerSec, Sensor: "compressor"},
		{Name: "intercooler_effectiveness", Quantity: "intercooler_effectiveness", Unit: pipeline.Ratio, Sensor: "intercooler"},
	}
}
func (d *chargeAir) Derive(_ time.Time, in, out []float64) uint64 {
	baro := in[4]
	if math.IsNaN(baro) {
		baro = d.baro
	}
	p1 := derive.CompressorInletPressure(in[3], !math.IsNaN(in[3]), baro, d.filterDrop)
	pr := derive.PressureRatio(in[0], p1)
	var mask uint64
	// Efficiency means something only with a real pressure rise.
	if pr > 1.15 && in[1]-in[2] > 5 {
		out[0] = derive.CompressorEfficiency(in[2], in[1], pr)
		mask |= 1
	}
	if !math.IsNaN(in[6]) {
		out[1] = d.ref.CorrectedMassFlow(in[6], p1, in[2])
		mask |= 2
	}
	if !math.IsNaN(in[5]) && in[1]-in[2] > 5 {
		out[2] = derive.IntercoolerEffectiveness(in[1], in[5], in[2])
		mask |= 4
	}
	return mask
}

// builtinRules are the warnings Plenum raises unless configured otherwise.
// Limits are common practice, no source; each can be overridden by a rule of
// the same name in the configuration.
func builtinRules() []config.WarningRule {
	return []config.WarningRule{
		{Name: "lean_under_boost", Rule: "lambda > 0.92 clear 0.88 and boost_pressure > 40000 clear 30000 for 300ms severity critical"},
		{Name: "over_boost", Rule: "boost_pressure > 130000 clear 120000 for 200ms severity critical"},
		{Name: "hot_intake_air", Rule: "intake_air_temp > 60 clear 55 for 2s"},
		{Name: "hot_oil", Rule: "oil_temp > 130 clear 125 for 5s"},
		{Name: "hot_coolant", Rule: "coolant_temp > 110 clear 105 for 5s severity critical"},
		{Name: "low_oil_pressure", Rule: "oil_pressure < 100000 clear 120000 and engine_speed > 2500 clear 2400 for 500ms severity critical"},
		{Name: "cold_engine_high_load", Rule: "turbo_warmup_warning > 0.5 clear 0.4 for 200ms"},
		{Name: "switched_off_hot", Rule: "turbo_shutdown_hot > 0.5 clear 0.4 for 100ms latch"},
	}
}

// buildDetectors returns the detectors the configured channels allow. The
// turbo guard is returned separately so that the daemon can save its state.
func buildDetectors(cfg *config.Config, reg *pipeline.Registry, derived map[string]bool) ([]pipeline.Derivation, *turboGuard, error) {
	has := func(n string) bool {
		_, ok := reg.Lookup(n)
		return ok || derived[n]
	}
	var ds []pipeline.Derivation
	e := cfg.Engine
	baro := e.BaroKPa * 1000
	if has("dyno_torque") && has("engine_speed") {
		std, err := derive.ParseStandard(cfg.Power.Standard)
		if err != nil {
			return nil, nil, fmt.Errorf("power.standard: %w", err)
		}
		ds = append(ds, &power{std: std, amb: derive.Ambient{Pressure: baro, Temperature: 25, Humidity: 0}})
	}
	if has("compressor_outlet_pressure") && has("charge_temp_pre_cooler") && has("ambient_temp") {
		ds = append(ds, &chargeAir{ref: derive.StandardDay(), baro: baro, filterDrop: cfg.Turbo.FilterDropKPa * 1000})
	}
	if has("throttle_position") && has("boost_pressure") && has("engine_speed") {
		det, err := lag.NewDetector(lag.Config{Target: cfg.Turbo.TargetBoostKPa * 1000})
		if err != nil {
			return nil, nil, fmt.Errorf("turbo lag: %w", err)
		}
		ds = append(ds, &lagDetector{det: det})
	}
	var guard *turboGuard
	if has("engine_speed") {
		wu, err := turbo.NewWarmUp(turbo.WarmUpConfig{OilTemp: cfg.Turbo.WarmOilC})
		if err != nil {
			return nil, nil, fmt.Errorf("turbo warm-up: %w", err)
		}
		cd, err := turbo.NewCoolDown(turbo.CoolDownConfig{Tau: time.Duration(cfg.Turbo.CoolDownTau)})
		if err != nil {
			return nil, nil, fmt.Errorf("turbo cool-down: %w", err)
		}
		guard = &turboGuard{warm: wu, cool: cd}
		if cfg.StateDir != "" {
			guard.stateFile = filepath.Join(cfg.StateDir, "turbo-"+cfg.Vehicle+".json")
		}
		ds = append(ds, guard)
		derived["turbo_warmup_warning"], derived["turbo_shutdown_hot"] = true, true
	}
	// Warnings: built-ins, replaced or extended by the configuration.
	rules := builtinRules()
	for _, r := range cfg.Warnings {
		replaced := false
		for i := range rules {
			if rules[i].Name == r.Name {
				rules[i], replaced = r, true
			}
		}
		if !replaced {
			rules = append(rules, r)
		}
	}
	var parsed []warn.Rule
	for _, r := range rules {
		if r.Rule == "off" {
			continue
		}
		rule, err := warn.Parse(r.Name, r.Rule)
		if err != nil {
			return nil, nil, fmt.Errorf("warning %s: %w", r.Name, err)
		}
		ok := true
		for _, ch := range ruleChannels(rule) {
			if !has(ch) {
				ok = false // a rule on a channel this setup lacks is left out
			}
		}
		if ok {
			parsed = append(parsed, rule)
		}
	}
	if len(parsed) > 0 {
		eng, err := warn.NewEngine(parsed)
		if err != nil {
			return nil, nil, fmt.Errorf("warnings: %w", err)
		}
		w := &warnings{eng: eng, names: eng.Channels()}
		for _, n := range w.names {
			idx, _ := eng.Channel(n)
			w.chIdx = append(w.chIdx, idx)
		}
		w.last = make([]float64, len(w.names))
		for i := range w.last {
			w.last[i] = math.NaN()
		}
		w.active = make([]float64, eng.Rules())
		ds = append(ds, w)
	}
	return ds, guard, nil
}

func ruleChannels(r warn.Rule) []string {
	var out []string
	var walk func(x warn.Expr)
	walk = func(x warn.Expr) {
		if x.Kind == warn.Leaf {
			out = append(out, x.Cond.Channel)
		}
		for _, a := range x.Args {
			walk(a)
		}
	}
	walk(r.When)
	return out
}
