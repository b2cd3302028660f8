package runs

import (
	"encoding/json"
	"strings"
	"testing"
)

func TestParseCommand(t *testing.T) {
	cases := []struct {
		payload, wantErr string
	}{
		{``, ""},
		{`{"request":"r1","label":"pull 2","conditions":{"pressure_pa":99800,"temperature_c":17,"relative_humidity":0.5}}`, ""},
		{`{"lable":"typo"}`, `unknown field "lable"`},
		{`{"conditions":{"relative_humidity":62}}`, "relative_humidity: 62 is outside 0–1"},
		{`{"conditions":{"pressure_pa":9980}}`, "pressure_pa: 9980 is outside"},
		{`{"label":"a"} {"label":"b"}`, "more than one JSON value"},
		{`start please`, "not a JSON command"},
	}
	for _, c := range cases {
		_, err := parseCommand([]byte(c.payload))
		if (c.wantErr == "") != (err == nil) || (err != nil && !strings.Contains(err.Error(), c.wantErr)) {
			t.Errorf("parseCommand(%q) = %v, want %q", c.payload, err, c.wantErr)
		}
	}
}

// FuzzParseCommand: any payload gives a command or an error, never a panic;
// an accepted command has its conditions in range and reads back the same.
func FuzzParseCommand(f *testing.F) {
	f.Add([]byte(`{"request":"r1","token":"t","label":"pull","notes":"n","conditions":{"pressure_pa":101325,"temperature_c":20,"relative_humidity":0.4}}`))
	f.Add([]byte(`{"conditions":{"temperature_c":1e308}}`))
	f.Add([]byte(`{}`))
	f.Add([]byte(`[1,2]`))
	f.Fuzz(func(t *testing.T, payload []byte) {
		c, err := parseCommand(payload)
		if err != nil {
			return
		}
		if c.Conditions != nil {
			if err := checkConditions(*c.Conditions); err != nil {
				t.Fatalf("accepted out-of-range conditions: %v", err)
			}
		}
		b, err := json.Marshal(c)
		if err != nil {
			t.Fatal(err)
		}
		c2, err := parseCommand(b)
		if err != nil || c2.Request != c.Request || c2.Label != c.Label || c2.Notes != c.Notes || c2.Token != c.Token {
			t.Fatalf("round trip: %+v → %s → %+v (%v)", c, b, c2, err)
		}
	})
}

// TestCommand drives the MQTT command handler through a run's life: the
// token is checked before anything else, a second start is refused, the
// stop replies with the summary, and unknown commands and bad payloads
// get an error reply echoing what they can.
func TestCommand(t *testing.T) {
	h := newHarness(t, Config{ControlToken: "tok"})
	cases := []struct {
		name, suffix, payload string
		wantOK                bool
		wantRequest, wantErr  string
		wantRun               bool // the reply names a run
		wantSummary           bool
		wantCurrent           bool // a run is being recorded afterwards
	}{
		{"bad payload", "run/start", `start`, false, "", "cmd/run/start: payload is not a JSON command", false, false, false},
		{"no token", "run/start", `{"request":"a"}`, false, "a", "unauthorized", false, false, false},
		{"wrong token", "run/start", `{"request":"b","token":"tak"}`, false, "b", "unauthorized", false, false, false},
		{"stop with no run", "run/stop", `{"request":"c","token":"tok"}`, false, "c", "no run is being recorded", false, false, false},
		{"start", "run/start", `{"request":"d","token":"tok","label":"pull 3","conditions":{"temperature_c":18.5,"source":"x"}}`, true, "d", "", true, false, true},
		{"second start", "run/start", `{"request":"e","token":"tok"}`, false, "e", "already being recorded", false, false, true},
		{"unknown", "run/pause", `{"request":"f","token":"tok"}`, false, "f", `unknown command "run/pause"`, false, false, true},
		{"stop", "run/stop", `{"request":"g","token":"tok"}`, true, "g", "", true, true, false},
	}
	for _, c := range cases {
		var rep Reply
		b := h.c.Command(c.suffix, []byte(c.payload))
		if err := json.Unmarshal(b, &rep); err != nil {
			t.Fatalf("%s: reply %s: %v", c.name, b, err)
		}
		if rep.OK != c.wantOK || rep.Request != c.wantRequest || (rep.Run != "") != c.wantRun || (rep.Summary != nil) != c.wantSummary ||
			(c.wantErr == "") != (rep.Error == "") || !strings.Contains(rep.Error, c.wantErr) {
			t.Errorf("%s: reply %s", c.name, b)
		}
		if (h.c.Current() != "") != c.wantCurrent {
			t.Errorf("%s: current run %q", c.name, h.c.Current())
		}
	}
	runs := h.runDirs()
	if len(runs) != 1 {
		t.Fatalf("%d runs recorded, want 1", len(runs))
	}
	m := h.meta(runs[0])
	if m.Label != "pull 3" || m.Conditions == nil || m.Conditions.TemperatureC == nil || *m.Conditions.TemperatureC != 18.5 ||
		m.Conditions.Source != "entered" {
		t.Errorf("run.json: %+v", m)
	}
	if len(h.published) != 1 {
		t.Errorf("%d summaries published, want 1", len(h.published))
	}
}
