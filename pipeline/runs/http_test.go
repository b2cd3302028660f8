package runs

import (
	"encoding/json"
	"errors"
	"net/http/httptest"
	"strings"
	"testing"
)

// fakeAck records acknowledgements; rule "nope" is not raised.
type fakeAck struct{ got []string }

func (f *fakeAck) ack(rule, via, by string) error {
	if rule == "nope" {
		return errors.New("nope: warning is not raised")
	}
	f.got = append(f.got, rule+"/"+via+"/"+by)
	return nil
}

// TestOneCommandParser: the HTTP API parses commands as the MQTT topics do
// (one parser): JSON bodies are read, unknown keys and form fields are
// refused, every answer is JSON with its content type, and error replies
// keep the request id.
func TestOneCommandParser(t *testing.T) {
	h := newHarness(t, Config{ControlToken: "s3cret"})
	fa := &fakeAck{}
	h.c.ack = fa.ack
	srv := h.c.Handler()
	cases := []struct {
		name, path, ctype, auth, body string
		want                          int
		reply                         Reply
	}{
		{"json unknown key", "/api/runs/start", "application/json", "Bearer s3cret", `{"request":"q1","lable":"typo"}`, 400,
			Reply{Request: "q1", Error: `payload is not a JSON command: json: unknown field "lable"`}},
		{"json bad conditions", "/api/runs/start", "application/json; charset=utf-8", "Bearer s3cret", `{"request":"q2","conditions":{"relative_humidity":62}}`, 400,
			Reply{Request: "q2", Error: "conditions: relative_humidity: 62 is outside 0–1"}},
		{"form unknown field", "/api/runs/start", "application/x-www-form-urlencoded", "Bearer s3cret", `request=q3&lable=typo`, 400,
			Reply{Request: "q3", Error: `unknown form field "lable" (known: request, label, notes, rule, by, pressure_kpa, temperature_c, humidity_percent)`}},
		{"unauthorized keeps the request", "/api/runs/start", "application/json", "Bearer nope", `{"request":"q4"}`, 401,
			Reply{Request: "q4", Error: "unauthorized: send the token of record.control_token_file as Authorization: Bearer TOKEN (plenum run-start reads it from $PLENUM_CONTROL_TOKEN or -token-file)"}},
		{"token in the body", "/api/runs/start", "application/json", "Bearer s3cret", `{"request":"q5","token":"s3cret"}`, 400,
			Reply{Request: "q5", Error: "token: over HTTP the token goes in the Authorization header, not the body"}},
		{"json start", "/api/runs/start", "application/json", "Bearer s3cret",
			`{"request":"q6","label":"pull 4","conditions":{"pressure_pa":98200,"temperature_c":21.5,"relative_humidity":0.4}}`, 200,
			Reply{Request: "q6", OK: true, Run: "20260501T100001.000Z"}},
		{"conflict keeps the request", "/api/runs/start", "", "Bearer s3cret", `request=q7`, 409,
			Reply{Request: "q7", Error: "run 20260501T100001.000Z is already being recorded"}},
		{"acknowledge", "/api/warnings/acknowledge", "application/json", "Bearer s3cret", `{"request":"q8","rule":"switched_off_hot","by":"me"}`, 200,
			Reply{Request: "q8", OK: true, Rule: "switched_off_hot"}},
		{"acknowledge by form", "/api/warnings/acknowledge", "application/x-www-form-urlencoded", "Bearer s3cret", `rule=switched_off_hot&by=cli`, 200,
			Reply{OK: true, Rule: "switched_off_hot"}},
		{"acknowledge not raised", "/api/warnings/acknowledge", "application/json", "Bearer s3cret", `{"request":"q9","rule":"nope"}`, 409,
			Reply{Request: "q9", Rule: "nope", Error: "nope: warning is not raised"}},
		{"acknowledge without rule", "/api/warnings/acknowledge", "application/json", "Bearer s3cret", `{"request":"q10"}`, 400,
			Reply{Request: "q10", Error: "warning/acknowledge needs the rule to acknowledge"}},
	}
	for _, c := range cases {
		req := httptest.NewRequest("POST", c.path, strings.NewReader(c.body))
		if c.ctype != "" {
			req.Header.Set("Content-Type", c.ctype)
		}
		req.Header.Set("Authorization", c.auth)
		w := httptest.NewRecorder()
		srv.ServeHTTP(w, req)
		var got Reply
		if err := json.Unmarshal(w.Body.Bytes(), &got); err != nil {
			t.Errorf("%s: not JSON: %q", c.name, w.Body.String())
			continue
		}
		if w.Code != c.want || got != c.reply || w.Header().Get("Content-Type") != "application/json" {
			t.Errorf("%s: %d %s %+v, want %d %+v", c.name, w.Code, w.Header().Get("Content-Type"), got, c.want, c.reply)
		}
	}
	if want := []string{"switched_off_hot/http/me", "switched_off_hot/http/cli"}; strings.Join(fa.got, ",") != strings.Join(want, ",") {
		t.Errorf("acknowledged %v, want %v", fa.got, want)
	}
	// The JSON start's conditions are the run's.
	if _, err := h.c.Stop(); err != nil {
		t.Fatal(err)
	}
	dirs := h.runDirs()
	if len(dirs) != 1 {
		t.Fatalf("%d runs", len(dirs))
	}
	m := h.meta(dirs[0])
	if m.Label != "pull 4" || m.Conditions == nil || m.Conditions.PressurePa == nil || *m.Conditions.PressurePa != 98200 ||
		m.Conditions.Source != "entered" {
		t.Errorf("run.json %+v", m)
	}
}

// TestCommandAcknowledge: warning/acknowledge over MQTT takes the token,
// names the path, and its error replies keep the request id.
func TestCommandAcknowledge(t *testing.T) {
	h := newHarness(t, Config{ControlToken: "tok"})
	fa := &fakeAck{}
	h.c.ack = fa.ack
	cases := []struct {
		name, payload string
		want          Reply
	}{
		{"no token", `{"request":"a","rule":"switched_off_hot"}`, Reply{Request: "a", Error: "unauthorized: the token does not match record.control_token_file"}},
		{"unknown key keeps the request", `{"request":"b","token":"tok","rulle":"x"}`, Reply{Request: "b", Error: `cmd/warning/acknowledge: payload is not a JSON command: json: unknown field "rulle"`}},
		{"two values keep the request", `{"request":"c"} {}`, Reply{Request: "c", Error: "cmd/warning/acknowledge: payload holds more than one JSON value"}},
		{"acknowledged", `{"request":"d","token":"tok","rule":"switched_off_hot","by":"pit"}`, Reply{Request: "d", OK: true, Rule: "switched_off_hot"}},
	}
	for _, c := range cases {
		var got Reply
		if err := json.Unmarshal(h.c.Command("warning/acknowledge", []byte(c.payload)), &got); err != nil {
			t.Fatal(err)
		}
		if got != c.want {
			t.Errorf("%s: %+v, want %+v", c.name, got, c.want)
		}
	}
	if len(fa.got) != 1 || fa.got[0] != "switched_off_hot/mqtt/pit" {
		t.Errorf("acknowledged %v", fa.got)
	}
}
