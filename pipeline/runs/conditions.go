package runs

import (
	"fmt"
	"net/url"
	"strconv"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// conditionsMaxAge is how old an ambient reading may be to count for the
// conditions at a run's start.
const conditionsMaxAge = 30 * time.Second

// conditionField is one ambient condition: its key in run.json and MQTT
// commands, its form field on the HTTP API (in the units people read off a
// weather station), the channel that measures it, and the range accepted.
type conditionField struct {
	name, form, channel string
	dst                 **float64
	scale               float64 // form units × scale = canonical units
	min, max            float64 // canonical units: what the ambient channels accept
}

// conditionFields lists the fields of c: the one table the start command's
// parsing, checking and sensor lookup share.
func conditionFields(c *record.Conditions) []conditionField {
	return []conditionField{
		{"pressure_pa", "pressure_kpa", "baro_pressure", &c.PressurePa, 1000, 50000, 110000},
		{"temperature_c", "temperature_c", "ambient_temp", &c.TemperatureC, 1, -40, 60},
		{"relative_humidity", "humidity_percent", "ambient_humidity", &c.RelativeHumidity, 0.01, 0, 1},
	}
}

// conditions fills the ambient conditions at the start: entered values
// first, then the latest fresh values of the ambient channels.
func (c *Controller) conditions(entered record.Conditions, now time.Time) record.Conditions {
	cond := entered
	fromSensors := false
	if c.store != nil {
		for _, f := range conditionFields(&cond) {
			if *f.dst != nil {
				continue
			}
			id, ok := c.reg.Lookup(f.channel)
			if !ok {
				continue
			}
			if v := c.store.Get(id); v.Fresh(now, conditionsMaxAge) {
				x := v.Value
				*f.dst, fromSensors = &x, true
			}
		}
	}
	switch {
	case !entered.Empty() && fromSensors:
		cond.Source = "sensors+entered"
	case !entered.Empty():
		cond.Source = "entered"
	case fromSensors:
		cond.Source = "sensors"
	}
	return cond
}

// checkConditions refuses entered conditions outside what the ambient
// channels accept (50–110 kPa, −40–60 °C, 0–1).
func checkConditions(c record.Conditions) error {
	for _, f := range conditionFields(&c) {
		if v := *f.dst; v != nil && !(*v >= f.min && *v <= f.max) {
			return fmt.Errorf("%s: %g is outside %g–%g", f.name, *v, f.min, f.max)
		}
	}
	return nil
}

// parseEntered reads the optional form fields pressure_kpa, temperature_c
// and humidity_percent: conditions read off a weather station.
func parseEntered(form url.Values, c *record.Conditions) error {
	for _, f := range conditionFields(c) {
		s := form.Get(f.form)
		if s == "" {
			continue
		}
		v, err := strconv.ParseFloat(s, 64)
		x := v * f.scale
		if err != nil || !(x >= f.min && x <= f.max) {
			return fmt.Errorf("%s: %q is not a number between %g and %g", f.form, s, f.min/f.scale, f.max/f.scale)
		}
		*f.dst = &x
	}
	return nil
}

// conditionsWait is how long a run started before the ambient sensors were
// fresh (a run that starts with the daemon) waits for them before run.json
// says which are missing.
const conditionsWait = 30 * time.Second

// pendingConditions is a run whose run.json still waits for fresh ambient
// sensors.
type pendingConditions struct {
	on      bool
	since   time.Time
	entered record.Conditions
}

// startConditions returns the conditions for run.json at a start, and
// whether they wait for ambient sensors that are registered but not fresh
// yet (fillConditions completes them). With no ambient sensor to read, the
// conditions say so.
func (c *Controller) startConditions(entered record.Conditions, now time.Time) (record.Conditions, bool) {
	cond := c.conditions(entered, now)
	missing, sensors := c.missingAmbient(cond)
	switch {
	case sensors == 0 && cond.Empty():
		cond.Note = "no ambient sensor configured and no conditions entered"
	case sensors == 0:
		cond.Note = "no ambient sensor configured for the values not entered"
	case len(missing) > 0:
		cond.Note = fmt.Sprintf("waiting up to %d s for fresh readings of %s", int(conditionsWait/time.Second), strings.Join(missing, ", "))
		return cond, true
	}
	return cond, false
}

// missingAmbient returns the ambient channels that are registered but gave
// cond no value, and how many ambient channels can be read at all.
func (c *Controller) missingAmbient(cond record.Conditions) (missing []string, sensors int) {
	if c.store == nil {
		return nil, 0
	}
	for _, f := range conditionFields(&cond) {
		if _, ok := c.reg.Lookup(f.channel); !ok {
			continue
		}
		sensors++
		if *f.dst == nil {
			missing = append(missing, f.channel)
		}
	}
	return missing, sensors
}

// fillConditions writes the conditions of a run that waited for its
// ambient sensors into its run.json once they are all fresh, or, after
// conditionsWait, what there is and which sensors were not fresh.
func (c *Controller) fillConditions(now time.Time) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cur == nil || !c.cond.on {
		return
	}
	cond := c.conditions(c.cond.entered, now)
	missing, _ := c.missingAmbient(cond)
	if len(missing) > 0 {
		if now.Sub(c.cond.since) < conditionsWait {
			return
		}
		cond.Note = fmt.Sprintf("%s not fresh within %d s of the start", strings.Join(missing, ", "), int(conditionsWait/time.Second))
		c.log.Warn("run conditions incomplete: ambient sensors not fresh", "run", c.cur.ID(), "missing", missing)
	}
	c.cond.on = false
	if err := c.cur.SetConditions(cond); err != nil {
		c.log.Error("cannot write the run's conditions into run.json", "run", c.cur.ID(), "err", err)
	}
}

// enterConditions hands entered conditions to the power correction and
// returns how power is corrected in the run, or nil when no power is
// derived.
func (c *Controller) enterConditions(entered record.Conditions) *record.Correction {
	if c.enter == nil {
		return nil
	}
	entered.Source, entered.Note = "", ""
	std := c.enter(entered)
	if std == "" {
		return nil
	}
	corr := &record.Correction{Standard: std, Others: "the ambient channels while fresh, else the configured defaults"}
	if !entered.Empty() {
		e := entered
		e.Source = "entered"
		corr.Entered = &e
		if e.PressurePa != nil && e.TemperatureC != nil && e.RelativeHumidity != nil {
			corr.Others = ""
		}
	}
	return corr
}
