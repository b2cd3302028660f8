// Package turbo guards a turbocharged engine: a warm-up guard that warns
// while engine speed or boost exceed limits before the oil is warm, and a
// cool-down model that estimates how long to idle before switching off.
// The defaults are common practice, no source: the only published guidance
// found is general ("idle for one to three minutes" after hard use,
// Wikipedia "Turbocharger"; owner's-handbook advice not to rev a cold
// engine). Pure code: time comes in with the samples.
package turbo

import (
	"fmt"
	"math"
	"time"
)

// WarmUpConfig sets the warm-up guard. Zero fields take the defaults.
type WarmUpConfig struct {
	// OilTemp is the oil temperature (°C) at which the engine counts as
	// warm. Default 60 °C (from memory, common practice, no source).
	OilTemp float64
	// MinTime is the least running time before the engine counts as warm
	// even with hot oil (a hot restart). Default 30 s (common practice, no
	// source).
	MinTime time.Duration
	// FallbackTime is the running time after which the engine counts as
	// warm when there is no oil temperature (NaN input). Default 5 min
	// (common practice, no source).
	FallbackTime time.Duration
	// RPMLimit is the engine speed (rpm) not to exceed while cold. Default
	// 3500 rpm (common practice, no source).
	RPMLimit float64
	// BoostLimit is the boost (gauge, Pa) not to exceed while cold. Default
	// 50 kPa (common practice, no source).
	BoostLimit float64
	// RunningRPM is the speed above which the engine counts as running.
	// Default 400 rpm.
	RunningRPM float64
}

func (c WarmUpConfig) withDefaults() WarmUpConfig {
	if c.OilTemp == 0 {
		c.OilTemp = 60
	}
	if c.MinTime == 0 {
		c.MinTime = 30 * time.Second
	}
	if c.FallbackTime == 0 {
		c.FallbackTime = 5 * time.Minute
	}
	if c.RPMLimit == 0 {
		c.RPMLimit = 3500
	}
	if c.BoostLimit == 0 {
		c.BoostLimit = 50000
	}
	if c.RunningRPM == 0 {
		c.RunningRPM = 400
	}
	return c
}

// Validate checks the configuration after defaults and names the bad field.
func (c WarmUpConfig) Validate() error {
	c = c.withDefaults()
	switch {
	case !finite(c.OilTemp):
		return fmt.Errorf("warm-up: oil_temp %g is not finite", c.OilTemp)
	case c.MinTime < 0 || c.FallbackTime < 0:
		return fmt.Errorf("warm-up: negative time")
	case !(c.RPMLimit > c.RunningRPM):
		return fmt.Errorf("warm-up: rpm_limit %g must exceed running_rpm %g", c.RPMLimit, c.RunningRPM)
	case !(c.BoostLimit > 0) || math.IsInf(c.BoostLimit, 0):
		return fmt.Errorf("warm-up: boost_limit %g must be positive", c.BoostLimit)
	case !(c.RunningRPM > 0):
		return fmt.Errorf("warm-up: running_rpm %g must be positive", c.RunningRPM)
	}
	return nil
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// Warm-up warning reasons.
const (
	ReasonColdRPM   = "engine speed above the warm-up limit"
	ReasonColdBoost = "boost above the warm-up limit"
)

// WarmUpStatus is the guard's output for one sample.
type WarmUpStatus struct {
	Running    bool          // engine speed above RunningRPM
	Warm       bool          // warm-up complete
	Warning    bool          // cold and over a limit
	Reason     string        // why Warning is set
	SinceStart time.Duration // running time
}

// WarmUp is the warm-up guard. Not safe for concurrent use.
type WarmUp struct {
	cfg     WarmUpConfig
	running bool
	start   time.Time
	warm    bool
}

// NewWarmUp returns a guard (defaults applied).
func NewWarmUp(cfg WarmUpConfig) (*WarmUp, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	return &WarmUp{cfg: cfg.withDefaults()}, nil
}

// Update feeds engine speed (rpm), boost (gauge Pa) and oil temperature
// (°C, NaN when unknown) at time t. Once warm the engine stays warm until
// it stops.
func (w *WarmUp) Update(t time.Time, rpm, boostPa, oilC float64) WarmUpStatus {
	if !(rpm > w.cfg.RunningRPM) {
		w.running, w.warm = false, false
		return WarmUpStatus{}
	}
	if !w.running {
		w.running, w.start = true, t
	}
	since := t.Sub(w.start)
	if !w.warm {
		if math.IsNaN(oilC) {
			w.warm = since >= w.cfg.FallbackTime
		} else {
			w.warm = oilC >= w.cfg.OilTemp && since >= w.cfg.MinTime
		}
	}
	s := WarmUpStatus{Running: true, Warm: w.warm, SinceStart: since}
	if !w.warm {
		switch {
		case rpm > w.cfg.RPMLimit:
			s.Warning, s.Reason = true, ReasonColdRPM
		case boostPa > w.cfg.BoostLimit:
			s.Warning, s.Reason = true, ReasonColdBoost
		}
	}
	return s
}
