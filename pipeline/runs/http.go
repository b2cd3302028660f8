package runs

import (
	"crypto/subtle"
	"encoding/json"
	"fmt"
	"io"
	"mime"
	"net/http"
	"net/url"
	"strings"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// maxCommandBody bounds a command's body: a command is a few hundred bytes.
const maxCommandBody = 64 << 10

// Handler serves GET /api/runs/current ({"run": id}) and, when
// Config.ControlToken is set, the commands POST /api/runs/start,
// POST /api/runs/stop and POST /api/warnings/acknowledge. A command's body
// is a JSON CommandPayload (Content-Type: application/json) or, for the
// command line, the form fields request, label, notes, pressure_kpa,
// temperature_c, humidity_percent, rule and by; unknown keys or fields are
// refused. Commands must carry "Authorization: Bearer <token>". Every
// answer is JSON (a Reply for commands), errors included, and echoes the
// request id.
func (c *Controller) Handler() http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /api/runs/current", func(w http.ResponseWriter, _ *http.Request) {
		writeJSON(w, http.StatusOK, map[string]string{"run": c.Current()})
	})
	command := func(cmd string) http.HandlerFunc {
		return func(w http.ResponseWriter, req *http.Request) {
			body, err := io.ReadAll(http.MaxBytesReader(w, req.Body, maxCommandBody))
			if err != nil {
				writeJSON(w, http.StatusRequestEntityTooLarge, Reply{Error: fmt.Sprintf("reading the command: %v", err)})
				return
			}
			isJSON := false
			if ct := req.Header.Get("Content-Type"); ct != "" {
				mt, _, _ := mime.ParseMediaType(ct)
				isJSON = mt == "application/json"
			}
			request := func() string {
				if isJSON {
					return requestOf(body)
				}
				v, _ := url.ParseQuery(string(body))
				return v.Get("request")
			}
			tok := c.cfg.ControlToken
			if tok == "" {
				writeJSON(w, http.StatusForbidden, Reply{Request: request(), Error: "commands are off: set record.control_token_file in the daemon's configuration to enable them"})
				return
			}
			if subtle.ConstantTimeCompare([]byte(req.Header.Get("Authorization")), []byte("Bearer "+tok)) != 1 {
				writeJSON(w, http.StatusUnauthorized, Reply{Request: request(), Error: "unauthorized: send the token of record.control_token_file as Authorization: Bearer TOKEN (plenum run-start reads it from $PLENUM_CONTROL_TOKEN or -token-file)"})
				return
			}
			var p CommandPayload
			if isJSON {
				p, err = parseCommand(body)
			} else {
				p, err = parseForm(body)
			}
			if err != nil {
				writeJSON(w, http.StatusBadRequest, Reply{Request: p.Request, Error: err.Error()})
				return
			}
			if p.Token != "" {
				writeJSON(w, http.StatusBadRequest, Reply{Request: p.Request, Error: "token: over HTTP the token goes in the Authorization header, not the body"})
				return
			}
			rep, status := c.do("http", cmd, p)
			writeJSON(w, status, rep)
		}
	}
	mux.HandleFunc("POST /api/runs/start", command("run/start"))
	mux.HandleFunc("POST /api/runs/stop", command("run/stop"))
	mux.HandleFunc("POST /api/warnings/acknowledge", command("warning/acknowledge"))
	return mux
}

// writeJSON answers v as JSON with its content type.
func writeJSON(w http.ResponseWriter, status int, v any) {
	b, _ := json.Marshal(v) // plain strings and numbers: cannot fail
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("X-Content-Type-Options", "nosniff")
	w.WriteHeader(status)
	w.Write(append(b, '\n'))
}

// formFields are the form fields a command may carry besides the
// conditions (conditionFields' form names).
var formFields = []string{"request", "label", "notes", "rule", "by"}

// parseForm reads a form-encoded command into the one CommandPayload, so
// that it is checked as a JSON one is: an unknown field is refused, an
// empty one is absent.
func parseForm(body []byte) (CommandPayload, error) {
	v, err := url.ParseQuery(string(body))
	if err != nil {
		return CommandPayload{}, fmt.Errorf("form: %w", err)
	}
	p := CommandPayload{Request: v.Get("request"), Label: v.Get("label"), Notes: v.Get("notes"), Rule: v.Get("rule"), By: v.Get("by")}
	var cond record.Conditions
	known := append([]string(nil), formFields...)
	for _, f := range conditionFields(&cond) {
		known = append(known, f.form)
	}
	for k, vs := range v {
		if !contains(known, k) {
			return CommandPayload{Request: p.Request}, fmt.Errorf("unknown form field %q (known: %s)", k, strings.Join(known, ", "))
		}
		if len(vs) > 1 {
			return CommandPayload{Request: p.Request}, fmt.Errorf("form field %q given %d times", k, len(vs))
		}
	}
	if err := parseEntered(v, &cond); err != nil {
		return CommandPayload{Request: p.Request}, err
	}
	if !cond.Empty() {
		p.Conditions = &cond
	}
	return p, nil
}

func contains(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}
