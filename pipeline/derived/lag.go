package derived

import (
	"math"
	"strconv"
	"time"

	"github.com/plenum-engine/plenum/derive/lag"
	"github.com/plenum-engine/plenum/pipeline"
)

// lagDetector wraps derive/lag: tip-ins and the boost response after them.
// It produces events only.
type lagDetector struct {
	emitter
	det *lag.Detector
}

// unknownGear stands for "no gear reading" in the detector: an event whose
// tip-in had no gear carries no gear tag rather than a made-up value.
const unknownGear = math.MinInt

// Name names the detector.
func (d *lagDetector) Name() string { return "turbo_lag" }

// Inputs are throttle, boost, engine speed and, optionally, the gear.
func (d *lagDetector) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "throttle_position"}, {Name: "boost_pressure"}, {Name: "engine_speed"}, {Name: "gear", Optional: true}}
}

// Outputs is none: lag measurements are events.
func (d *lagDetector) Outputs() []pipeline.Channel { return nil }

// Derive feeds the detector and emits a turbo_lag (or turbo_lag_discarded)
// event when a measurement ends.
func (d *lagDetector) Derive(t time.Time, in, _ []float64) uint64 {
	gear := unknownGear
	if !math.IsNaN(in[3]) {
		gear = int(math.Round(in[3]))
	}
	ev, ok := d.det.Update(t, in[0], in[1], in[2], gear)
	if !ok {
		return 0
	}
	kind := "turbo_lag"
	tags := map[string]string{}
	if ev.Gear != unknownGear {
		tags["gear"] = strconv.Itoa(ev.Gear)
	}
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
