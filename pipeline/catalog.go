package pipeline

import (
	"sort"
	"time"
)

// standard lists Plenum's own channel names with their quantity, canonical
// unit and Prometheus sensor label. Read-only.
var standard = map[string]Channel{
	"engine_speed":               {Quantity: "engine_speed", Unit: RPM, Sensor: "crank", Min: 0, Max: 20000},
	"throttle_position":          {Quantity: "throttle_position", Unit: Ratio, Sensor: "throttle", Min: -0.05, Max: 1.05},
	"manifold_pressure":          {Quantity: "pressure", Unit: Pascal, Sensor: "manifold", Min: 5000, Max: 500000},
	"baro_pressure":              {Quantity: "pressure", Unit: Pascal, Sensor: "barometric", Min: 50000, Max: 110000, MaxAge: 10 * time.Second},
	"compressor_inlet_pressure":  {Quantity: "pressure", Unit: Pascal, Sensor: "compressor_inlet", Min: 50000, Max: 110000},
	"compressor_outlet_pressure": {Quantity: "pressure", Unit: Pascal, Sensor: "compressor_outlet", Min: 20000, Max: 600000},
	"intake_air_temp":            {Quantity: "temperature", Unit: Celsius, Sensor: "intake_air", Min: -40, Max: 150},
	"charge_temp_pre_cooler":     {Quantity: "temperature", Unit: Celsius, Sensor: "charge_pre_cooler", Min: -40, Max: 250},
	"ambient_temp":               {Quantity: "temperature", Unit: Celsius, Sensor: "ambient", Min: -40, Max: 60, MaxAge: 10 * time.Second},
	"ambient_humidity":           {Quantity: "relative_humidity", Unit: Ratio, Sensor: "ambient", Min: 0, Max: 1, MaxAge: 30 * time.Second},
	"coolant_temp":               {Quantity: "temperature", Unit: Celsius, Sensor: "coolant", Min: -40, Max: 150},
	"oil_temp":                   {Quantity: "temperature", Unit: Celsius, Sensor: "oil", Min: -40, Max: 180},
	"exhaust_temp":               {Quantity: "temperature", Unit: Celsius, Sensor: "exhaust", Min: -40, Max: 1200},
	"oil_pressure":               {Quantity: "relative_pressure", Unit: Pascal, Sensor: "oil", Min: -10000, Max: 1200000},
	"wideband_voltage":           {Quantity: "voltage", Unit: Volts, Sensor: "wideband", Min: -0.1, Max: 5.2},
	"dyno_torque":                {Quantity: "torque", Unit: NewtonMetres, Sensor: "dyno", Min: -2000, Max: 5000},
	"gear":                       {Quantity: "gear", Unit: None, Sensor: "gearbox", Min: -1, Max: 10},
}

// Standard returns the definition of one of Plenum's standard input channels,
// with the name set and the source left for the caller.
func Standard(name string) (Channel, bool) {
	c, ok := standard[name]
	c.Name = name
	return c, ok
}

// StandardNames lists the standard input channel names, sorted.
func StandardNames() []string {
	var s []string
	for k := range standard {
		s = append(s, k)
	}
	sort.Strings(s)
	return s
}
