package display

import (
	"fmt"
	"strings"
)

// Pressure is the unit pressures are shown in.
type Pressure uint8

// Pressure units. The zero value is kPa.
const (
	KPa Pressure = iota // kilopascal
	Bar                 // bar, 100 kPa
	PSI                 // pound-force per square inch
)

// Boost says against what the pressures a person reads as boost are shown:
// the manifold and boost pressures (see IsBoostChannel), not the barometric,
// fuel or oil pressures.
type Boost uint8

// Boost references. The zero value shows each channel as it is measured
// (manifold pressure absolute, boost_pressure relative to the ambient).
const (
	AsMeasured Boost = iota // as the channel measures it
	Gauge                   // relative to the barometric pressure the caller supplies
	Absolute                // absolute: boost_pressure plus the barometric pressure
)

// Temperature is the unit temperatures are shown in.
type Temperature uint8

// Temperature units. The zero value is °C.
const (
	Celsius    Temperature = iota // degree Celsius
	Fahrenheit                    // degree Fahrenheit
)

// Power is the unit power is shown in. Horsepower comes in two kinds, both
// offered and named.
type Power uint8

// Power units. The zero value is kW.
const (
	KW       Power = iota // kilowatt
	HPMech                // mechanical horsepower, 550 ft·lbf/s (745.699 9 W), symbol hp
	HPMetric              // metric horsepower, 75 kgf·m/s (735.498 75 W), symbol PS
)

// Torque is the unit torque is shown in.
type Torque uint8

// Torque units. The zero value is N·m.
const (
	NewtonMetre Torque = iota // newton metre
	PoundFoot                 // pound-force foot, lbf·ft
)

// MassFlow is the unit mass flows (air, fuel) are shown in.
type MassFlow uint8

// Mass flow units. The zero value is g/s.
const (
	GramsPerSecond   MassFlow = iota // g/s
	KilogramsPerHour                 // kg/h
	PoundsPerMinute                  // lb/min (avoirdupois pound)
)

// Mixture says how mixture strength is shown.
type Mixture uint8

// Mixture displays. The zero value is λ.
const (
	Lambda Mixture = iota // the air-fuel equivalence ratio λ
	AFR                   // the air-fuel ratio by mass for the configured fuel: λ × stoichiometric ratio
)

// Speed is the unit vehicle speed is shown in.
type Speed uint8

// Speed units. The zero value is km/h.
const (
	KMH Speed = iota // kilometre per hour
	MPH              // mile per hour
)

// VolumeFlow is the unit fuel volume flow is shown in.
type VolumeFlow uint8

// Volume flow units. The zero value is L/h.
const (
	LitresPerHour  VolumeFlow = iota // L/h
	GallonsPerHour                   // US liquid gallon per hour
)

// Units are a person's unit choices, one per quantity. The zero value is the
// metric default: kPa (each pressure as measured), °C, kW, N·m, g/s, λ,
// km/h, L/h. Engine speed is always in rpm, and ratios a person reads as
// percentages (throttle, efficiency, humidity, load, trims) always in %.
type Units struct {
	Pressure    Pressure
	Boost       Boost
	Temperature Temperature
	Power       Power
	Torque      Torque
	MassFlow    MassFlow
	Mixture     Mixture
	Speed       Speed
	VolumeFlow  VolumeFlow
}

// choice is one value a key accepts: its name in the compact form (first
// name; the rest are accepted spellings) and its number.
type choice struct {
	names []string
	v     uint8
}

// key is one item of the compact form.
type key struct {
	name    string
	what    string // for sentences: "pressure unit"
	choices []choice
	field   func(u *Units) *uint8
}

// keys are the items of the compact form, in the order String writes them.
var keys = [...]key{
	{"pressure", "pressure unit", []choice{{[]string{"kPa"}, uint8(KPa)}, {[]string{"bar"}, uint8(Bar)}, {[]string{"psi"}, uint8(PSI)}},
		func(u *Units) *uint8 { return (*uint8)(&u.Pressure) }},
	{"boost", "boost reference", []choice{{[]string{"measured", "as_measured"}, uint8(AsMeasured)}, {[]string{"gauge"}, uint8(Gauge)}, {[]string{"absolute"}, uint8(Absolute)}},
		func(u *Units) *uint8 { return (*uint8)(&u.Boost) }},
	{"temperature", "temperature unit", []choice{{[]string{"C", "°C", "celsius"}, uint8(Celsius)}, {[]string{"F", "°F", "fahrenheit"}, uint8(Fahrenheit)}},
		func(u *Units) *uint8 { return (*uint8)(&u.Temperature) }},
	{"power", "power unit", []choice{{[]string{"kW"}, uint8(KW)}, {[]string{"hp_mech"}, uint8(HPMech)}, {[]string{"hp_metric", "PS"}, uint8(HPMetric)}},
		func(u *Units) *uint8 { return (*uint8)(&u.Power) }},
	{"torque", "torque unit", []choice{{[]string{"Nm", "N·m", "N.m"}, uint8(NewtonMetre)}, {[]string{"lbft", "lbf·ft", "lbf.ft", "lbf_ft"}, uint8(PoundFoot)}},
		func(u *Units) *uint8 { return (*uint8)(&u.Torque) }},
	{"mass_flow", "mass flow unit", []choice{{[]string{"g/s", "g_s"}, uint8(GramsPerSecond)}, {[]string{"kg/h", "kg_h"}, uint8(KilogramsPerHour)}, {[]string{"lb/min", "lb_min"}, uint8(PoundsPerMinute)}},
		func(u *Units) *uint8 { return (*uint8)(&u.MassFlow) }},
	{"mixture", "mixture display", []choice{{[]string{"lambda", "λ"}, uint8(Lambda)}, {[]string{"afr"}, uint8(AFR)}},
		func(u *Units) *uint8 { return (*uint8)(&u.Mixture) }},
	{"speed", "speed unit", []choice{{[]string{"km/h", "kmh", "km_h"}, uint8(KMH)}, {[]string{"mph"}, uint8(MPH)}},
		func(u *Units) *uint8 { return (*uint8)(&u.Speed) }},
	{"volume_flow", "volume flow unit", []choice{{[]string{"L/h", "l_h", "lph"}, uint8(LitresPerHour)}, {[]string{"gal/h", "gal_h", "gph"}, uint8(GallonsPerHour)}},
		func(u *Units) *uint8 { return (*uint8)(&u.VolumeFlow) }},
}

// Keys returns the item names of the compact form, in order.
func Keys() []string {
	out := make([]string, len(keys))
	for i, k := range keys {
		out[i] = k.name
	}
	return out
}

// Choices returns the values an item of the compact form accepts (their
// first spelling), or nil for an unknown key.
func Choices(keyName string) []string {
	for _, k := range keys {
		if k.name == keyName {
			out := make([]string, len(k.choices))
			for i, c := range k.choices {
				out[i] = c.names[0]
			}
			return out
		}
	}
	return nil
}

// ParseError is a refused item of the compact form. Its message is a
// complete sentence that names the item.
type ParseError struct {
	Item   string // the item as written, e.g. "power=hp"
	Reason string // why, a clause
}

// Error says which item was refused and why.
func (e *ParseError) Error() string {
	return fmt.Sprintf("The display unit item %q is refused: %s.", e.Item, e.Reason)
}

// ParseUnits reads the compact form of unit choices, a comma-separated list
// of key=value items such as "pressure=bar,temperature=F,power=hp_mech,
// mixture=afr" (for a query parameter or a browser's local storage). Keys
// are Keys(); values are matched without regard to case. Items not given
// keep the default; empty items and spaces around items are ignored. A
// refusal is a *ParseError naming the item.
func ParseUnits(s string) (Units, error) {
	var u Units
	err := u.Set(s)
	return u, err
}

// Set applies the items of the compact form s on top of u (the per-browser
// override of a configured default). On error u is unchanged.
func (u *Units) Set(s string) error {
	out := *u
	var seen [len(keys)]bool
	for item := range strings.SplitSeq(s, ",") {
		item = strings.TrimSpace(item)
		if item == "" {
			continue
		}
		name, val, ok := strings.Cut(item, "=")
		name, val = strings.TrimSpace(name), strings.TrimSpace(val)
		if !ok {
			return &ParseError{item, "an item is written key=value, for example pressure=bar"}
		}
		k := -1
		for i := range keys {
			if strings.EqualFold(keys[i].name, name) {
				k = i
			}
		}
		if k < 0 {
			return &ParseError{item, fmt.Sprintf("%q is not a quantity this layer knows; the keys are %s", name, strings.Join(Keys(), ", "))}
		}
		if seen[k] {
			return &ParseError{item, fmt.Sprintf("%s is given twice", keys[k].name)}
		}
		seen[k] = true
		v, ok := keys[k].lookup(val)
		if !ok {
			return &ParseError{item, keys[k].refusal(val)}
		}
		*keys[k].field(&out) = v
	}
	*u = out
	return nil
}

// lookup finds a value's choice.
func (k key) lookup(val string) (uint8, bool) {
	for _, c := range k.choices {
		for _, n := range c.names {
			if strings.EqualFold(n, val) {
				return c.v, true
			}
		}
	}
	return 0, false
}

// refusal explains why val is not one of k's choices.
func (k key) refusal(val string) string {
	if k.name == "power" && strings.EqualFold(strings.TrimSpace(val), "hp") {
		return "say which horsepower, hp_mech (mechanical, 550 ft·lbf/s = 745.7 W) or hp_metric (metric, PS, 75 kgf·m/s = 735.5 W)"
	}
	names := make([]string, len(k.choices))
	for i, c := range k.choices {
		names[i] = c.names[0]
	}
	if val == "" {
		return fmt.Sprintf("the %s is missing; choose %s", k.what, strings.Join(names, ", "))
	}
	return fmt.Sprintf("%q is not a %s this layer offers; choose %s", val, k.what, strings.Join(names, ", "))
}

// String writes u in the compact form, the items that differ from the
// default only, in the order of Keys; the defaults are "". ParseUnits reads
// it back to u.
func (u Units) String() string {
	var b strings.Builder
	for i := range keys {
		v := *keys[i].field(&u)
		if v == 0 {
			continue
		}
		if b.Len() > 0 {
			b.WriteByte(',')
		}
		b.WriteString(keys[i].name)
		b.WriteByte('=')
		name := fmt.Sprint(v) // unreachable for values Set and the constants give
		for _, c := range keys[i].choices {
			if c.v == v {
				name = c.names[0]
			}
		}
		b.WriteString(name)
	}
	return b.String()
}
