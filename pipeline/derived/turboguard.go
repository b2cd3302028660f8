package derived

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"time"

	"github.com/plenum-engine/plenum/derive/turbo"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/durable"
)

// turboGuard wraps derive/turbo: the warm-up guard and the cool-down timer.
type turboGuard struct {
	warm      *turbo.WarmUp
	cool      *turbo.CoolDown
	wasRun    bool
	stateFile string // "": the cool-down state is neither saved nor restored
}

// Name names the detector.
func (d *turboGuard) Name() string { return "turbo_guard" }

// Inputs are engine speed and, optionally, boost, oil and exhaust
// temperature and air mass flow.
func (d *turboGuard) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "engine_speed"}, {Name: "boost_pressure", Optional: true}, {Name: "oil_temp", Optional: true},
		{Name: "exhaust_temp", Optional: true}, {Name: "air_mass_flow", Optional: true}}
}

// Outputs are the warm-up warning, the thermal model's state and the
// cool-down advice.
func (d *turboGuard) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("turbo_warmup_warning", "turbo_thermal_state", "cooldown_idle_remaining", "safe_to_switch_off", "turbo_shutdown_hot")
}

// Derive updates the warm-up guard and the cool-down timer; switching off
// while the turbo is still hot latches turbo_shutdown_hot until the engine
// runs again.
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

// save writes the cool-down state so that a restart keeps it, replacing
// the state file durably (pipeline/durable): a power cut leaves the old
// state or the new, whole.
func (d *turboGuard) save() error {
	if d.stateFile == "" {
		return nil
	}
	b, err := json.Marshal(d.cool.State())
	if err != nil {
		return err
	}
	if err := durable.WriteFile(d.stateFile, b, 0o644); err != nil {
		return fmt.Errorf("turbo state: %w", err)
	}
	return nil
}

// load creates the state file's directory and restores a saved cool-down
// state, cooled for the time it was off. When the directory cannot be
// created, saving is turned off and the error wraps ErrStateDir.
func (d *turboGuard) load(now time.Time) error {
	if err := os.MkdirAll(filepath.Dir(d.stateFile), 0o755); err != nil {
		d.stateFile = ""
		return fmt.Errorf("%w: %w", ErrStateDir, err)
	}
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
