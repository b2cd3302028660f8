package runs

import (
	"bytes"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"fmt"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// CommandPayload is the JSON payload of <prefix>/<vehicle>/cmd/run/start
// and …/cmd/run/stop. Every key is optional; token is required when
// Config.ControlToken is set.
type CommandPayload struct {
	Request    string             `json:"request"` // echoed in the reply
	Token      string             `json:"token"`
	Label      string             `json:"label"`
	Notes      string             `json:"notes"`
	Conditions *record.Conditions `json:"conditions"` // entered conditions, SI units
}

// Reply is published on <prefix>/<vehicle>/reply/run/start|stop.
type Reply struct {
	Request string          `json:"request,omitempty"`
	OK      bool            `json:"ok"`
	Run     string          `json:"run,omitempty"`
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
		return CommandPayload{}, fmt.Errorf("payload is not a JSON command: %w", err)
	}
	if dec.More() {
		return CommandPayload{}, errors.New("payload holds more than one JSON value")
	}
	if c.Conditions != nil {
		if err := checkConditions(*c.Conditions); err != nil {
			return CommandPayload{}, fmt.Errorf("conditions: %w", err)
		}
	}
	return c, nil
}

// Command serves the MQTT command topics run/start and run/stop: suffix is
// the topic after cmd/, payload a CommandPayload; it returns the JSON
// Reply to publish.
func (c *Controller) Command(suffix string, payload []byte) []byte {
	rep := Reply{}
	reply := func() []byte {
		b, _ := json.Marshal(rep) // plain strings and numbers: cannot fail
		return b
	}
	p, err := parseCommand(payload)
	if err != nil {
		rep.Error = fmt.Sprintf("cmd/%s: %v", suffix, err)
		return reply()
	}
	rep.Request = p.Request
	if tok := c.cfg.ControlToken; tok != "" && subtle.ConstantTimeCompare([]byte(p.Token), []byte(tok)) != 1 {
		rep.Error = "unauthorized: the token does not match record.control_token_file"
		c.log.Warn("mqtt run command refused: bad token", "topic", suffix)
		return reply()
	}
	switch suffix {
	case "run/start":
		sr := StartRequest{Label: p.Label, Notes: p.Notes, By: "mqtt"}
		if p.Conditions != nil {
			sr.Entered = *p.Conditions
			sr.Entered.Source = ""
		}
		id, err := c.Start(sr)
		if err != nil {
			rep.Error = err.Error()
			return reply()
		}
		rep.OK, rep.Run = true, id
	case "run/stop":
		sum, err := c.stop("mqtt")
		if sum.Run == "" {
			rep.Error = err.Error()
			return reply()
		}
		rep.OK, rep.Run, rep.Summary = err == nil, sum.Run, &sum
		if err != nil {
			rep.Error = err.Error()
		}
	default:
		rep.Error = fmt.Sprintf("unknown command %q: use run/start or run/stop", suffix)
	}
	return reply()
}
