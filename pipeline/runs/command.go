package runs

import (
	"bytes"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// CommandPayload is the one command format of the HTTP API (a JSON body)
// and of the MQTT command topics (<prefix>/<vehicle>/cmd/run/start,
// …/cmd/run/stop, …/cmd/warning/acknowledge). Every key is optional but
// rule, which warning/acknowledge needs; unknown keys are refused. Over
// MQTT, token is required when Config.ControlToken is set; over HTTP the
// token goes in the Authorization header.
type CommandPayload struct {
	Request    string             `json:"request"` // echoed in the reply, errors included
	Token      string             `json:"token"`
	Label      string             `json:"label"`
	Notes      string             `json:"notes"`
	Conditions *record.Conditions `json:"conditions"` // entered conditions, SI units
	Rule       string             `json:"rule"`       // warning/acknowledge: the warning rule
	By         string             `json:"by"`         // warning/acknowledge: who acknowledges
}

// Reply answers a command: published on <prefix>/<vehicle>/reply/<command>
// and the body of every HTTP command reply (application/json).
type Reply struct {
	Request string          `json:"request,omitempty"`
	OK      bool            `json:"ok"`
	Run     string          `json:"run,omitempty"`
	Rule    string          `json:"rule,omitempty"`
	Error   string          `json:"error,omitempty"`
	Summary *record.Summary `json:"summary,omitempty"`
}

// parseCommand reads a command payload (empty: no keys) and checks its
// conditions.
func parseCommand(payload []byte) (CommandPayload, error) {
	var c CommandPayload
	if len(payload) == 0 {
		return c, nil
	}
	dec := json.NewDecoder(bytes.NewReader(payload))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&c); err != nil {
		return CommandPayload{Request: requestOf(payload)}, fmt.Errorf("payload is not a JSON command: %w", err)
	}
	if dec.More() {
		return CommandPayload{Request: requestOf(payload)}, errors.New("payload holds more than one JSON value")
	}
	if c.Conditions != nil {
		if err := checkConditions(*c.Conditions); err != nil {
			return CommandPayload{Request: c.Request}, fmt.Errorf("conditions: %w", err)
		}
	}
	return c, nil
}

// requestOf returns the request id of a payload parseCommand refused, when
// it can be read at all, so that the error reply still names it.
func requestOf(payload []byte) string {
	var r struct {
		Request string `json:"request"`
	}
	if json.Unmarshal(payload, &r) == nil {
		return r.Request
	}
	// Several values or trailing garbage: the first value may still say.
	if json.NewDecoder(bytes.NewReader(payload)).Decode(&r) == nil {
		return r.Request
	}
	return ""
}

// Command serves the MQTT command topics run/start, run/stop and
// warning/acknowledge: suffix is the topic after cmd/, payload a
// CommandPayload; it returns the JSON Reply to publish.
func (c *Controller) Command(suffix string, payload []byte) []byte {
	p, err := parseCommand(payload)
	if err != nil {
		return jsonReply(Reply{Request: p.Request, Error: fmt.Sprintf("cmd/%s: %v", suffix, err)})
	}
	if tok := c.cfg.ControlToken; tok != "" && subtle.ConstantTimeCompare([]byte(p.Token), []byte(tok)) != 1 {
		c.log.Warn("mqtt command refused: bad token", "topic", suffix)
		return jsonReply(Reply{Request: p.Request, Error: "unauthorized: the token does not match record.control_token_file"})
	}
	rep, _ := c.do("mqtt", suffix, p)
	return jsonReply(rep)
}

func jsonReply(r Reply) []byte {
	b, _ := json.Marshal(r) // plain strings and numbers: cannot fail
	return b
}

// do carries out an authorised command that came by path via ("http",
// "mqtt") and returns the reply and its HTTP status.
func (c *Controller) do(via, cmd string, p CommandPayload) (Reply, int) {
	rep := Reply{Request: p.Request}
	fail := func(status int, err error) (Reply, int) {
		rep.OK, rep.Error = false, err.Error()
		return rep, status
	}
	switch cmd {
	case "run/start":
		if p.Rule != "" || p.By != "" {
			return fail(http.StatusBadRequest, errors.New("run/start takes no rule or by"))
		}
		sr := StartRequest{Label: p.Label, Notes: p.Notes, By: via}
		if p.Conditions != nil {
			sr.Entered = *p.Conditions
			sr.Entered.Source = ""
		}
		id, err := c.Start(sr)
		if err != nil {
			return fail(http.StatusConflict, err)
		}
		rep.OK, rep.Run = true, id
	case "run/stop":
		sum, err := c.stop(via)
		if sum.Run == "" {
			return fail(http.StatusConflict, err)
		}
		rep.OK, rep.Run, rep.Summary = err == nil, sum.Run, &sum
		if err != nil {
			rep.Error = err.Error()
			return rep, http.StatusInternalServerError
		}
	case "warning/acknowledge":
		if p.Rule == "" {
			return fail(http.StatusBadRequest, errors.New("warning/acknowledge needs the rule to acknowledge"))
		}
		if c.ack == nil {
			return fail(http.StatusNotFound, errors.New("this daemon evaluates no warnings"))
		}
		rep.Rule = p.Rule
		if err := c.ack(p.Rule, via, p.By); err != nil {
			c.log.Info("warning acknowledgement refused", "rule", p.Rule, "via", via, "by", p.By, "err", err)
			return fail(http.StatusConflict, err)
		}
		c.log.Info("warning acknowledged", "rule", p.Rule, "via", via, "by", p.By)
		rep.OK = true
	default:
		return fail(http.StatusNotFound, fmt.Errorf("unknown command %q: use run/start, run/stop or warning/acknowledge", cmd))
	}
	return rep, http.StatusOK
}
