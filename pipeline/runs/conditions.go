package runs

import (
	"fmt"
	"net/url"
	"strconv"
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
