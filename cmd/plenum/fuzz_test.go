package main

import (
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/pipeline/record"
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
		req := httptest.NewRequest(http.MethodPost, "/api/runs/start", strings.NewReader(c.form))
		req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
		var cond record.Conditions
		err := parseEntered(req, &cond)
		if (c.wantErr == "") != (err == nil) || (err != nil && !strings.Contains(err.Error(), c.wantErr)) {
			t.Errorf("%s: err %v, want %q", c.form, err, c.wantErr)
		}
		if c.wantPa != 0 && (cond.PressurePa == nil || *cond.PressurePa != c.wantPa) {
			t.Errorf("%s: pressure %v, want %g", c.form, cond.PressurePa, c.wantPa)
		}
	}
}
