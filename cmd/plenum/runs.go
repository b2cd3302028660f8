package main

import (
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"math"
	"net/http"
	"net/url"
	"os"
	"os/user"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline/derived"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/runs"
)

// runsConfig converts the record section into the run controller's Config,
// reading the control token from record.control_token_file. auto_trigger
// alone means runs are started by the trigger, not at start-up.
func runsConfig(cfg *config.Config) (runs.Config, error) {
	tok, err := controlToken(cfg)
	if err != nil {
		return runs.Config{}, err
	}
	return runs.Config{
		Dir:          cfg.Record.Dir,
		Vehicle:      cfg.Vehicle,
		SyncEvery:    time.Duration(cfg.Record.SyncEvery),
		RotateBytes:  int64(cfg.Record.RotateMB) << 20,
		MinFreeBytes: int64(cfg.Record.MinFreeMB) << 20,
		ConfigYAML:   cfg.Raw,
		Manual:       cfg.Record.Manual || cfg.Record.AutoTrigger,
		AutoTrigger:  cfg.Record.AutoTrigger,
		ControlToken: tok,
	}, nil
}

// enterConditions hands the conditions entered for a run to the power
// correction, in its units (NaN: not entered).
func enterConditions(set *derived.Set) func(record.Conditions) string {
	return func(c record.Conditions) string {
		if c.Empty() {
			return set.EnterConditions(nil)
		}
		v := func(p *float64) float64 {
			if p == nil {
				return math.NaN()
			}
			return *p
		}
		return set.EnterConditions(&derive.Ambient{Pressure: v(c.PressurePa), Temperature: v(c.TemperatureC), Humidity: v(c.RelativeHumidity)})
	}
}

// minTokenLen is the shortest control token accepted: 16 characters of a
// generated token (openssl rand -hex 16 gives 32) are beyond guessing.
const minTokenLen = 16

// controlToken reads the control token from record.control_token_file (a
// token already in cfg, set by a test, wins). The example's placeholder, an
// empty file and a token too short to be safe are refused.
func controlToken(cfg *config.Config) (string, error) {
	if cfg.Record.ControlToken != "" || cfg.Record.ControlTokenFile == "" {
		return cfg.Record.ControlToken, nil
	}
	tok, err := readSecret("record.control_token_file", cfg.Record.ControlTokenFile)
	if err != nil {
		return "", cfg.At(secretProblem(err), "record", "control_token_file")
	}
	switch {
	case strings.Contains(strings.ToLower(tok), "change-me") || strings.Contains(strings.ToLower(tok), "changeme"):
		return "", cfg.At(fmt.Sprintf("%s holds the example's placeholder token, which anyone can read in the example: write a random one, e.g. openssl rand -hex 16 > %s", cfg.Record.ControlTokenFile, cfg.Record.ControlTokenFile), "record", "control_token_file")
	case len(tok) < minTokenLen:
		return "", cfg.At(fmt.Sprintf("%s holds a token of %d characters; a control token needs at least %d, e.g. from openssl rand -hex 16", cfg.Record.ControlTokenFile, len(tok), minTokenLen), "record", "control_token_file")
	}
	return tok, nil
}

// cmdRunControl is `plenum run-start` and `plenum run-stop`: they ask a
// running daemon's local HTTP API, with the control token from
// PLENUM_CONTROL_TOKEN or -token-file. run-start prints {"run": id},
// run-stop the run's summary.
func cmdRunControl(verb string, args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("run-"+verb, flag.ContinueOnError)
	addr := fs.String("addr", "127.0.0.1:9108", "the daemon's HTTP address")
	tokenFile := fs.String("token-file", "", "file holding the control token (default: $PLENUM_CONTROL_TOKEN)")
	label := fs.String("label", "", "run label (run-start)")
	notes := fs.String("notes", "", "free-form notes (run-start)")
	pressure := fs.String("pressure-kpa", "", "ambient pressure read off a barometer, kPa (run-start; default: the sensor)")
	temp := fs.String("temperature-c", "", "ambient temperature, °C (run-start; default: the sensor)")
	hum := fs.String("humidity-percent", "", "relative humidity, % (run-start; default: the sensor)")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	form := url.Values{"label": {*label}, "notes": {*notes}, "pressure_kpa": {*pressure}, "temperature_c": {*temp}, "humidity_percent": {*hum}}
	rep, err := postCommand("run-"+verb, *addr, *tokenFile, "/api/runs/"+verb, form)
	if err != nil {
		return err
	}
	var out []byte
	if rep.Summary != nil {
		out = rep.Summary.JSON()
	} else {
		out, _ = json.Marshal(map[string]string{"run": rep.Run})
	}
	fmt.Fprintf(stdout, "%s\n", out)
	return nil
}

// cmdWarningAck is `plenum warning-ack -rule NAME`: it acknowledges a
// raised warning in a running daemon, so that a latched one (such as
// switched_off_hot) clears once its condition has gone. The daemon records
// a warning_acknowledged event saying by whom (-by, default the user name).
func cmdWarningAck(args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("warning-ack", flag.ContinueOnError)
	addr := fs.String("addr", "127.0.0.1:9108", "the daemon's HTTP address")
	tokenFile := fs.String("token-file", "", "file holding the control token (default: $PLENUM_CONTROL_TOKEN)")
	rule := fs.String("rule", "", "the warning rule to acknowledge, e.g. switched_off_hot")
	by := fs.String("by", "", "who acknowledges, recorded in the event (default: the user name)")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	if *rule == "" || fs.NArg() > 0 {
		return usageError{"warning-ack needs -rule NAME and nothing else"}
	}
	who := *by
	if who == "" {
		if u, err := user.Current(); err == nil {
			who = u.Username
		}
	}
	if _, err := postCommand("warning-ack", *addr, *tokenFile, "/api/warnings/acknowledge", url.Values{"rule": {*rule}, "by": {who}}); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "%s acknowledged\n", *rule)
	return nil
}

// postCommand sends a form-encoded command to a running daemon's HTTP API
// with the control token and returns its reply; a reply that is not OK is
// an error carrying the daemon's words.
func postCommand(name, addr, tokenFile, path string, form url.Values) (runs.Reply, error) {
	token := os.Getenv("PLENUM_CONTROL_TOKEN")
	if tokenFile != "" {
		var err error
		if token, err = readSecret(name+": -token-file", tokenFile); err != nil {
			return runs.Reply{}, err
		}
	}
	for k, v := range form {
		if len(v) == 1 && v[0] == "" {
			delete(form, k)
		}
	}
	req, err := http.NewRequest(http.MethodPost, "http://"+addr+path, strings.NewReader(form.Encode()))
	if err != nil {
		return runs.Reply{}, err
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	req.Header.Set("Authorization", "Bearer "+token)
	c := &http.Client{Timeout: 10 * time.Second}
	resp, err := c.Do(req)
	if err != nil {
		return runs.Reply{}, fmt.Errorf("%s: %w", name, err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	var rep runs.Reply
	if err := json.Unmarshal(body, &rep); err != nil {
		return runs.Reply{}, fmt.Errorf("%s: %s: %s", name, resp.Status, strings.TrimSpace(string(body)))
	}
	if resp.StatusCode != http.StatusOK || !rep.OK {
		return rep, fmt.Errorf("%s: %s: %s", name, resp.Status, rep.Error)
	}
	return rep, nil
}
