package display

import (
	"errors"
	"strings"
	"testing"
	"unicode"
	"unicode/utf8"
)

func TestParseUnits(t *testing.T) {
	cases := []struct {
		in   string
		want Units
	}{
		{"", Units{}},
		{" , ,", Units{}},
		{"pressure=bar,temperature=F,power=hp_mech,mixture=afr", Units{Pressure: Bar, Temperature: Fahrenheit, Power: HPMech, Mixture: AFR}},
		{"pressure=psi,boost=gauge", Units{Pressure: PSI, Boost: Gauge}},
		{"boost=absolute", Units{Boost: Absolute}},
		{"boost=measured", Units{}},
		{"power=PS", Units{Power: HPMetric}},
		{"power=hp_metric", Units{Power: HPMetric}},
		{"power=kW", Units{}},
		{"POWER=KW", Units{}},
		{" temperature = °F ", Units{Temperature: Fahrenheit}},
		{"temperature=celsius", Units{}},
		{"torque=lbft", Units{Torque: PoundFoot}},
		{"torque=lbf·ft", Units{Torque: PoundFoot}},
		{"torque=N·m", Units{}},
		{"mass_flow=kg/h", Units{MassFlow: KilogramsPerHour}},
		{"mass_flow=lb_min", Units{MassFlow: PoundsPerMinute}},
		{"mixture=λ", Units{}},
		{"speed=mph", Units{Speed: MPH}},
		{"speed=km/h", Units{}},
		{"volume_flow=gal/h", Units{VolumeFlow: GallonsPerHour}},
		{"volume_flow=l/h", Units{}},
		{"pressure=bar,", Units{Pressure: Bar}},
	}
	for _, c := range cases {
		t.Run(c.in, func(t *testing.T) {
			got, err := ParseUnits(c.in)
			if err != nil {
				t.Fatal(err)
			}
			if got != c.want {
				t.Errorf("%+v, want %+v", got, c.want)
			}
		})
	}
}

// Refusals are *ParseError, and their message is one complete sentence
// that names the item and says what is accepted.
func TestParseUnitsRefusals(t *testing.T) {
	cases := []struct {
		in, item string
		says     []string
	}{
		{"power=hp", "power=hp", []string{"say which horsepower", "hp_mech", "hp_metric", "745.7 W", "735.5 W"}},
		{"pressure=atm", "pressure=atm", []string{`"atm" is not a pressure unit`, "kPa, bar, psi"}},
		{"pressure=bar,colour=red", "colour=red", []string{`"colour" is not a quantity`, "pressure, boost, temperature"}},
		{"pressure", "pressure", []string{"key=value"}},
		{"temperature=", "temperature=", []string{"temperature unit is missing", "C, F"}},
		{"pressure=bar,pressure=psi", "pressure=psi", []string{"pressure is given twice"}},
		{"boost=vacuum", "boost=vacuum", []string{"measured, gauge, absolute"}},
		{"mixture=phi", "mixture=phi", []string{"lambda, afr"}},
	}
	for _, c := range cases {
		t.Run(c.in, func(t *testing.T) {
			u := Units{Speed: MPH}
			err := u.Set(c.in)
			var pe *ParseError
			if !errors.As(err, &pe) {
				t.Fatalf("err = %v, want a *ParseError", err)
			}
			if pe.Item != c.item {
				t.Errorf("item %q, want %q", pe.Item, c.item)
			}
			msg := err.Error()
			if !strings.Contains(msg, `"`+c.item+`"`) {
				t.Errorf("%q does not name %q", msg, c.item)
			}
			for _, s := range c.says {
				if !strings.Contains(msg, s) {
					t.Errorf("%q lacks %q", msg, s)
				}
			}
			if !isSentence(msg) {
				t.Errorf("%q is not a complete sentence", msg)
			}
			if u != (Units{Speed: MPH}) {
				t.Errorf("a refused Set changed the units: %+v", u)
			}
		})
	}
}

// isSentence: starts with a capital letter, ends with a full stop.
func isSentence(s string) bool {
	r, _ := utf8.DecodeRuneInString(s)
	return unicode.IsUpper(r) && strings.HasSuffix(s, ".")
}

// Set applies an override on top of a configured default.
func TestSetOverrides(t *testing.T) {
	u := Units{Pressure: Bar, Temperature: Fahrenheit}
	if err := u.Set("pressure=psi,mixture=afr"); err != nil {
		t.Fatal(err)
	}
	if want := (Units{Pressure: PSI, Temperature: Fahrenheit, Mixture: AFR}); u != want {
		t.Errorf("%+v, want %+v", u, want)
	}
}

// String writes the items that differ from the default, and reads back.
func TestUnitsString(t *testing.T) {
	cases := []struct {
		u    Units
		want string
	}{
		{Units{}, ""},
		{Units{Pressure: Bar, Temperature: Fahrenheit, Power: HPMech, Mixture: AFR}, "pressure=bar,temperature=F,power=hp_mech,mixture=afr"},
		{Units{Pressure: PSI, Boost: Absolute, Temperature: Fahrenheit, Power: HPMetric, Torque: PoundFoot, MassFlow: PoundsPerMinute, Mixture: AFR, Speed: MPH, VolumeFlow: GallonsPerHour},
			"pressure=psi,boost=absolute,temperature=F,power=hp_metric,torque=lbft,mass_flow=lb/min,mixture=afr,speed=mph,volume_flow=gal/h"},
	}
	for _, c := range cases {
		if got := c.u.String(); got != c.want {
			t.Errorf("%+v: %q, want %q", c.u, got, c.want)
		}
		back, err := ParseUnits(c.u.String())
		if err != nil || back != c.u {
			t.Errorf("%q reads back as %+v, %v", c.u.String(), back, err)
		}
	}
}

func TestKeysAndChoices(t *testing.T) {
	if got := strings.Join(Keys(), ","); got != "pressure,boost,temperature,power,torque,mass_flow,mixture,speed,volume_flow" {
		t.Errorf("Keys: %s", got)
	}
	if got := strings.Join(Choices("power"), ","); got != "kW,hp_mech,hp_metric" {
		t.Errorf("Choices(power): %s", got)
	}
	if Choices("colour") != nil {
		t.Error("Choices of an unknown key")
	}
	for _, k := range Keys() {
		for _, c := range Choices(k) {
			if _, err := ParseUnits(k + "=" + c); err != nil {
				t.Errorf("%s=%s: %v", k, c, err)
			}
		}
	}
}

// The parser never panics; what it accepts it writes back in a form that
// reads back to the same units; what it refuses it refuses in a sentence
// naming an item of the input.
func FuzzParseUnits(f *testing.F) {
	for _, s := range []string{"", "pressure=bar,temperature=F,power=hp_mech,mixture=afr", "power=hp", "pressure=bar,pressure=psi", "x", "=,=", "torque=lbf·ft"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		u, err := ParseUnits(s)
		if err != nil {
			var pe *ParseError
			if !errors.As(err, &pe) {
				t.Fatalf("%q: %v is not a *ParseError", s, err)
			}
			if !strings.Contains(s, pe.Item) || !isSentence(err.Error()) {
				t.Fatalf("%q: refusal %q", s, err)
			}
			return
		}
		back, err := ParseUnits(u.String())
		if err != nil || back != u {
			t.Fatalf("%q → %+v → %q → %+v, %v", s, u, u.String(), back, err)
		}
	})
}
