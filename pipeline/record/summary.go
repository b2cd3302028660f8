package record

import (
	"encoding/json"
	"math"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// Summary is what a run comes to, computed from every sample that reached
// the run's files. Peaks are in canonical units; NaN-free (absent values
// are omitted).
type Summary struct {
	Run     string    `json:"run"`
	Vehicle string    `json:"vehicle"`
	Start   time.Time `json:"start"`
	End     time.Time `json:"end"`
	Samples uint64    `json:"samples"` // samples written
	// SamplesLost counts the samples of the run that never reached its
	// files: dropped by a full queue, or refused by the disk; EventsLost
	// the events; Gaps the recording_gap events written into the run.
	SamplesLost uint64 `json:"samples_lost"`
	EventsLost  uint64 `json:"events_lost,omitempty"`
	Gaps        int    `json:"recording_gaps,omitempty"`

	PeakCorrectedPowerW *float64 `json:"peak_corrected_power_watts,omitempty"`
	PeakPowerRPM        *float64 `json:"peak_power_engine_speed_rpm,omitempty"`
	PeakTorqueNm        *float64 `json:"peak_torque_newton_meters,omitempty"`
	PeakTorqueRPM       *float64 `json:"peak_torque_engine_speed_rpm,omitempty"`
	PeakBoostPa         *float64 `json:"peak_boost_pascals,omitempty"`
	MinLambdaUnderLoad  *float64 `json:"min_lambda_under_load,omitempty"`
	MaxLambdaUnderLoad  *float64 `json:"max_lambda_under_load,omitempty"`
	MaxIntakeAirC       *float64 `json:"max_intake_air_temp_celsius,omitempty"`
	LagEvents           int      `json:"turbo_lag_events"`
	WarningsRaised      int      `json:"warnings_raised"`
	// Conditions are the means of the ambient channels over the run, where
	// the car had those sensors.
	Conditions *Conditions `json:"conditions,omitempty"`
	// Correction says which standard corrected power and with which
	// entered conditions (the run's Config.Correction).
	Correction *Correction `json:"power_correction,omitempty"`
	// ReplayOf is, in a replayed run's summary, the id of the recorded run
	// it replays; ReplayConfig the configuration it was replayed with: its
	// path, or "the run's own".
	ReplayOf     string `json:"replay_of,omitempty"`
	ReplayConfig string `json:"replay_config,omitempty"`
}

// Conditions are the ambient conditions of a run: what the power correction
// standards need. A nil field was neither measured nor entered.
type Conditions struct {
	PressurePa       *float64 `json:"pressure_pa,omitempty"`
	TemperatureC     *float64 `json:"temperature_c,omitempty"`
	RelativeHumidity *float64 `json:"relative_humidity,omitempty"` // 0–1
	// Source says where the values come from: "sensors" (the latest fresh
	// values at the start), "entered" (given with the start command),
	// "sensors+entered", or "mean of sensors" in a summary.
	Source string `json:"source,omitempty"`
	// Note says why values are missing, e.g. "no ambient sensor
	// configured" or "sensors not fresh within 30 s".
	Note string `json:"note,omitempty"`
}

// Empty reports whether c holds no value.
func (c Conditions) Empty() bool {
	return c.PressurePa == nil && c.TemperatureC == nil && c.RelativeHumidity == nil
}

// underLoad is the boost above which λ counts as "under load" (common
// practice, no source: clearly on boost).
const underLoad = 20000.0

// role is what a channel means to the summary.
type role uint8

const (
	roleNone role = iota
	roleRPM
	rolePower
	roleTorque
	roleBoost
	roleLambda
	roleIAT
	roleAmbP
	roleAmbT
	roleAmbH
)

func roleOf(name string) role {
	switch name {
	case "engine_speed":
		return roleRPM
	case "corrected_power":
		return rolePower
	case "dyno_torque":
		return roleTorque
	case "boost_pressure":
		return roleBoost
	case "lambda":
		return roleLambda
	case "intake_air_temp":
		return roleIAT
	case "baro_pressure":
		return roleAmbP
	case "ambient_temp":
		return roleAmbT
	case "ambient_humidity":
		return roleAmbH
	}
	return roleNone
}

// summarizer folds samples and events into a Summary.
type summarizer struct {
	rpm, boost         float64
	haveRPM, haveBoost bool
	ambSum             [3]float64 // pressure, temperature, humidity
	ambN               [3]int
	s                  Summary
}

func newSummarizer(run, vehicle string) *summarizer {
	return &summarizer{s: Summary{Run: run, Vehicle: vehicle}}
}

func peak(p **float64, v float64, higher bool) bool {
	if *p == nil || (higher && v > **p) || (!higher && v < **p) {
		x := v
		*p = &x
		return true
	}
	return false
}

func (z *summarizer) sample(ro role, s pipeline.Sample) {
	if z.s.Start.IsZero() || s.Time.Before(z.s.Start) {
		z.s.Start = s.Time
	}
	if s.Time.After(z.s.End) {
		z.s.End = s.Time
	}
	z.s.Samples++
	if ro == roleNone || !s.Quality.Usable() || math.IsNaN(s.Value) {
		return
	}
	switch ro {
	case roleRPM:
		z.rpm, z.haveRPM = s.Value, true
	case rolePower:
		if peak(&z.s.PeakCorrectedPowerW, s.Value, true) && z.haveRPM {
			x := z.rpm
			z.s.PeakPowerRPM = &x
		}
	case roleTorque:
		if peak(&z.s.PeakTorqueNm, s.Value, true) && z.haveRPM {
			x := z.rpm
			z.s.PeakTorqueRPM = &x
		}
	case roleBoost:
		z.boost, z.haveBoost = s.Value, true
		peak(&z.s.PeakBoostPa, s.Value, true)
	case roleLambda:
		if z.haveBoost && z.boost > underLoad {
			peak(&z.s.MinLambdaUnderLoad, s.Value, false)
			peak(&z.s.MaxLambdaUnderLoad, s.Value, true)
		}
	case roleIAT:
		peak(&z.s.MaxIntakeAirC, s.Value, true)
	case roleAmbP, roleAmbT, roleAmbH:
		z.ambSum[ro-roleAmbP] += s.Value
		z.ambN[ro-roleAmbP]++
	}
}

// summary returns the summary with the ambient means filled in.
func (z *summarizer) summary() Summary {
	s := z.s
	var c Conditions
	for i, p := range []**float64{&c.PressurePa, &c.TemperatureC, &c.RelativeHumidity} {
		if z.ambN[i] > 0 {
			m := z.ambSum[i] / float64(z.ambN[i])
			*p = &m
		}
	}
	if !c.Empty() {
		c.Source = "mean of sensors"
		s.Conditions = &c
	}
	return s
}

func (z *summarizer) event(e pipeline.Event) {
	switch e.Kind {
	case "turbo_lag":
		z.s.LagEvents++
	case "warning_raised":
		z.s.WarningsRaised++
	}
}

// JSON returns the summary as indented JSON.
func (s Summary) JSON() []byte {
	b, _ := json.MarshalIndent(s, "", "  ")
	return append(b, '\n')
}

// Ambient returns the conditions as derive's ambient state (NaN where a
// value is absent), or nil when none is given.
func (c Conditions) Ambient() *derive.Ambient {
	if c.Empty() {
		return nil
	}
	v := func(p *float64) float64 {
		if p == nil {
			return math.NaN()
		}
		return *p
	}
	return &derive.Ambient{Pressure: v(c.PressurePa), Temperature: v(c.TemperatureC), Humidity: v(c.RelativeHumidity)}
}
