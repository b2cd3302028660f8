package runs

import (
	"encoding/json"
	"fmt"
	"net/url"
	"os"
	"path/filepath"
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

// ambientController is a controller over a registry with the three ambient
// channels and a store the test fills; it records into a temporary
// directory and its clock does not move by itself.
func ambientController(t *testing.T, d Deps) (*Controller, fakeStore, map[string]pipeline.ChannelID, string) {
	t.Helper()
	reg := pipeline.NewRegistry()
	ids := map[string]pipeline.ChannelID{}
	for _, name := range []string{"baro_pressure", "ambient_temp", "ambient_humidity"} {
		id, err := reg.Register(pipeline.Channel{Name: name, Quantity: name, Source: "s"})
		if err != nil {
			t.Fatal(err)
		}
		ids[name] = id
	}
	g, err := pipeline.BuildGraph(reg, nil)
	if err != nil {
		t.Fatal(err)
	}
	st := fakeStore{}
	dir := t.TempDir()
	d.Registry, d.Sub, d.Store = reg, pipeline.New(reg, g, pipeline.Options{}).Subscribe("recorder", 64), st
	now := time.Date(2026, 5, 1, 10, 0, 0, 0, time.UTC)
	d.Now = func() time.Time { return now }
	return New(Config{Dir: dir, Vehicle: "v"}, d), st, ids, dir
}

func readMeta(t *testing.T, dir, run string) record.Meta {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(dir, run, "run.json"))
	if err != nil {
		t.Fatal(err)
	}
	var m record.Meta
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatal(err)
	}
	return m
}

// TestConditionsOnceFresh: a run that starts before the ambient sensors
// are fresh (as one that starts with the daemon) writes its conditions into
// run.json once they are, or after 30 s says which were not; without
// ambient sensors run.json says there are none.
func TestConditionsOnceFresh(t *testing.T) {
	t0 := time.Date(2026, 5, 1, 10, 0, 0, 0, time.UTC)
	t.Run("fresh later", func(t *testing.T) {
		c, st, ids, dir := ambientController(t, Deps{})
		id, err := c.Start(StartRequest{})
		if err != nil {
			t.Fatal(err)
		}
		if m := readMeta(t, dir, id); m.Conditions == nil || !m.Conditions.Empty() ||
			m.Conditions.Note != "waiting up to 30 s for fresh readings of baro_pressure, ambient_temp, ambient_humidity" {
			t.Fatalf("at the start: %+v", m.Conditions)
		}
		st[ids["baro_pressure"]] = pipeline.Value{Value: 98700, Time: t0.Add(time.Second), Set: true}
		c.fillConditions(t0.Add(2 * time.Second)) // two of three still missing: waits
		if m := readMeta(t, dir, id); m.Conditions.PressurePa != nil {
			t.Fatalf("written before all were fresh: %+v", m.Conditions)
		}
		st[ids["ambient_temp"]] = pipeline.Value{Value: 17.5, Time: t0.Add(3 * time.Second), Set: true}
		st[ids["ambient_humidity"]] = pipeline.Value{Value: 0.55, Time: t0.Add(3 * time.Second), Set: true}
		c.fillConditions(t0.Add(3 * time.Second))
		m := readMeta(t, dir, id)
		if cd := m.Conditions; cd == nil || cd.PressurePa == nil || *cd.PressurePa != 98700 || cd.TemperatureC == nil || *cd.TemperatureC != 17.5 ||
			cd.RelativeHumidity == nil || *cd.RelativeHumidity != 0.55 || cd.Source != "sensors" || cd.Note != "" || m.ID != id || m.Vehicle != "v" {
			t.Fatalf("once fresh: %+v", m)
		}
		// Written once: later readings do not rewrite the start's conditions.
		st[ids["ambient_temp"]] = pipeline.Value{Value: 30, Time: t0.Add(4 * time.Second), Set: true}
		c.fillConditions(t0.Add(4 * time.Second))
		if m := readMeta(t, dir, id); *m.Conditions.TemperatureC != 17.5 {
			t.Errorf("rewritten: %+v", m.Conditions)
		}
	})
	t.Run("never fresh", func(t *testing.T) {
		c, st, ids, dir := ambientController(t, Deps{})
		id, err := c.Start(StartRequest{})
		if err != nil {
			t.Fatal(err)
		}
		st[ids["ambient_temp"]] = pipeline.Value{Value: 17.5, Time: t0.Add(20 * time.Second), Set: true}
		c.fillConditions(t0.Add(29 * time.Second))
		if m := readMeta(t, dir, id); m.Conditions.TemperatureC != nil {
			t.Fatalf("written before 30 s: %+v", m.Conditions)
		}
		c.fillConditions(t0.Add(30 * time.Second))
		if m := readMeta(t, dir, id); m.Conditions == nil || m.Conditions.TemperatureC == nil || *m.Conditions.TemperatureC != 17.5 ||
			m.Conditions.Note != "baro_pressure, ambient_humidity not fresh within 30 s of the start" {
			t.Fatalf("after 30 s: %+v", m.Conditions)
		}
	})
	t.Run("no ambient sensor", func(t *testing.T) {
		h := newHarness(t, Config{})
		id, err := h.c.Start(StartRequest{})
		if err != nil {
			t.Fatal(err)
		}
		if m := h.meta(filepath.Join(h.dir, id)); m.Conditions == nil || m.Conditions.Note != "no ambient sensor configured and no conditions entered" {
			t.Fatalf("run.json %+v", m.Conditions)
		}
	})
}

// TestEnteredConditionsUsed: conditions entered at the start go to the
// power correction for the run and back to the sensors at the stop; run.json
// and the summary say which conditions and which standard were used.
func TestEnteredConditionsUsed(t *testing.T) {
	var got []string
	enter := func(c record.Conditions) string {
		s := "sensors"
		if !c.Empty() {
			s = fmt.Sprintf("%v/%v/%v", *c.PressurePa, *c.TemperatureC, c.RelativeHumidity)
		}
		got = append(got, s)
		return "sae_j1349"
	}
	c, _, _, dir := ambientController(t, Deps{EnterConditions: enter})
	var rep Reply
	if err := json.Unmarshal(c.Command("run/start", []byte(`{"request":"r","conditions":{"pressure_pa":98200,"temperature_c":21.5}}`)), &rep); err != nil || !rep.OK {
		t.Fatalf("start: %+v %v", rep, err)
	}
	want := record.Correction{Standard: "sae_j1349", Others: "the ambient channels while fresh, else the configured defaults"}
	check := func(what string, corr *record.Correction) {
		t.Helper()
		if corr == nil || corr.Standard != want.Standard || corr.Others != want.Others || corr.Entered == nil ||
			corr.Entered.PressurePa == nil || *corr.Entered.PressurePa != 98200 || corr.Entered.TemperatureC == nil ||
			*corr.Entered.TemperatureC != 21.5 || corr.Entered.RelativeHumidity != nil || corr.Entered.Source != "entered" {
			t.Errorf("%s: %+v", what, corr)
		}
	}
	check("run.json", readMeta(t, dir, rep.Run).Correction)
	sum, err := c.Stop()
	if err != nil {
		t.Fatal(err)
	}
	check("summary", sum.Correction)
	b, err := os.ReadFile(filepath.Join(dir, rep.Run, "summary.json"))
	var onDisk record.Summary
	if err == nil {
		err = json.Unmarshal(b, &onDisk)
	}
	if err != nil {
		t.Fatal(err)
	}
	check("summary.json", onDisk.Correction)
	if want := []string{"98200/21.5/<nil>", "sensors"}; fmt.Sprint(got) != fmt.Sprint(want) {
		t.Errorf("handed to the correction %v, want %v", got, want)
	}
}
