package runs

import (
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

func TestParseEntered(t *testing.T) {
	cases := []struct {
		form    string
		wantErr string
		wantPa  float64
	}{
		{"pressure_kpa=99.1", "", 99100},
		{"pressure_kpa=NaN", "pressure_kpa", 0},
		{"pressure_kpa=120", "between 50 and 110", 0},
		{"humidity_percent=140", "humidity_percent", 0},
		{"temperature_c=abc", "temperature_c", 0},
	}
	for _, c := range cases {
		form, err := url.ParseQuery(c.form)
		if err != nil {
			t.Fatal(err)
		}
		var cond record.Conditions
		err = parseEntered(form, &cond)
		if (c.wantErr == "") != (err == nil) || (err != nil && !strings.Contains(err.Error(), c.wantErr)) {
			t.Errorf("%s: err %v, want %q", c.form, err, c.wantErr)
		}
		if c.wantPa != 0 && (cond.PressurePa == nil || *cond.PressurePa != c.wantPa) {
			t.Errorf("%s: pressure %v, want %g", c.form, cond.PressurePa, c.wantPa)
		}
	}
}

// TestConditions: entered values win, fresh ambient readings fill the
// rest, stale or flagged ones do not, and the source says which.
func TestConditions(t *testing.T) {
	t0 := time.Unix(5000, 0)
	f := func(x float64) *float64 { return &x }
	cases := []struct {
		name       string
		entered    record.Conditions
		store      map[string]pipeline.Value
		nilStore   bool
		wantPa     *float64
		wantTemp   *float64
		wantHum    *float64
		wantSource string
	}{
		{name: "nothing", wantSource: ""},
		{name: "no store", nilStore: true, entered: record.Conditions{TemperatureC: f(12)}, wantTemp: f(12), wantSource: "entered"},
		{name: "sensors", store: map[string]pipeline.Value{
			"baro_pressure":    {Value: 99000, Time: t0.Add(-time.Second), Set: true},
			"ambient_temp":     {Value: 21, Time: t0, Set: true},
			"ambient_humidity": {Value: 0.4, Time: t0.Add(-31 * time.Second), Set: true}, // stale
		}, wantPa: f(99000), wantTemp: f(21), wantSource: "sensors"},
		{name: "entered wins", entered: record.Conditions{PressurePa: f(101000)}, store: map[string]pipeline.Value{
			"baro_pressure":    {Value: 99000, Time: t0, Set: true},
			"ambient_humidity": {Value: 0.5, Time: t0, Set: true},
			"ambient_temp":     {Value: 21, Time: t0, Quality: pipeline.SensorFault, Set: true},
		}, wantPa: f(101000), wantHum: f(0.5), wantSource: "sensors+entered"},
	}
	eq := func(a, b *float64) bool { return (a == nil) == (b == nil) && (a == nil || *a == *b) }
	for _, c := range cases {
		reg := pipeline.NewRegistry()
		st := fakeStore{}
		for _, name := range []string{"baro_pressure", "ambient_temp", "ambient_humidity"} {
			id, err := reg.Register(pipeline.Channel{Name: name, Quantity: name, Source: "s"})
			if err != nil {
				t.Fatal(err)
			}
			if v, ok := c.store[name]; ok {
				st[id] = v
			}
		}
		d := Deps{Registry: reg}
		if !c.nilStore {
			d.Store = st
		}
		got := New(Config{}, d).conditions(c.entered, t0)
		if !eq(got.PressurePa, c.wantPa) || !eq(got.TemperatureC, c.wantTemp) || !eq(got.RelativeHumidity, c.wantHum) || got.Source != c.wantSource {
			t.Errorf("%s: %+v", c.name, got)
		}
	}
}

type fakeStore map[pipeline.ChannelID]pipeline.Value

func (s fakeStore) Get(id pipeline.ChannelID) pipeline.Value { return s[id] }
