package main

import (
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
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
		ConfigYAML:   cfg.Raw,
		Manual:       cfg.Record.Manual || cfg.Record.AutoTrigger,
		AutoTrigger:  cfg.Record.AutoTrigger,
		ControlToken: tok,
	}, nil
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
// PLENUM_CONTROL_TOKEN or -token-file. Only run-start takes a label, notes
// and conditions.
func cmdRunControl(verb string, args []string, stdout io.Writer) error {
	name := "run-" + verb
	what := "Starts a run in a running daemon and prints its id."
	if verb == "stop" {
		what = "Stops the run of a running daemon and prints the run's summary."
	}
	fs := newFlagSet(name, "[flags]", what+"\nThe control token (the daemon's record.control_token_file) comes from\n$PLENUM_CONTROL_TOKEN or -token-file.", stdout)
	addr := fs.String("addr", "127.0.0.1:9108", "the daemon's HTTP address: host:port or http://host:port")
	tokenFile := fs.String("token-file", "", "file holding the control token (default: $PLENUM_CONTROL_TOKEN)")
	form := url.Values{}
	if verb == "start" {
		for _, f := range []struct{ flag, field, usage string }{
			{"label", "label", "run label"},
			{"notes", "notes", "free-form notes"},
			{"pressure-kpa", "pressure_kpa", "ambient pressure read off a barometer, kPa (default: the sensor)"},
			{"temperature-c", "temperature_c", "ambient temperature, °C (default: the sensor)"},
			{"humidity-percent", "humidity_percent", "relative humidity, % (default: the sensor)"},
		} {
			fs.Func(f.flag, f.usage, func(v string) error { form.Set(f.field, v); return nil })
		}
	}
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	base, err := daemonURL(*addr)
	if err != nil {
		return usageError{fmt.Sprintf("%s: %v", name, err)}
	}
	token := os.Getenv("PLENUM_CONTROL_TOKEN")
	if *tokenFile != "" {
		if token, err = readSecret(name+": -token-file", *tokenFile); err != nil {
			return err
		}
	}
	if token == "" {
		return usageError{fmt.Sprintf("%s: no control token: give the token of the daemon's record.control_token_file in $PLENUM_CONTROL_TOKEN or with -token-file FILE", name)}
	}
	req, err := http.NewRequest(http.MethodPost, base+"/api/runs/"+verb, strings.NewReader(form.Encode()))
	if err != nil {
		return fmt.Errorf("%s: %w", name, err)
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	req.Header.Set("Authorization", "Bearer "+token)
	c := &http.Client{Timeout: 10 * time.Second}
	resp, err := c.Do(req)
	if err != nil {
		return fmt.Errorf("%s: %w", name, err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	switch resp.StatusCode {
	case http.StatusOK:
		stdout.Write(body)
		return nil
	case http.StatusUnauthorized:
		src := "$PLENUM_CONTROL_TOKEN"
		if *tokenFile != "" {
			src = *tokenFile
		}
		return fmt.Errorf("%s: the daemon refused the control token from %s (%s): give the token of the daemon's record.control_token_file in $PLENUM_CONTROL_TOKEN or with -token-file FILE", name, src, resp.Status)
	}
	return fmt.Errorf("%s: %s: %s", name, resp.Status, strings.TrimSpace(string(body)))
}

// daemonURL turns -addr into the daemon's base URL: host:port, or an
// http:// or https:// URL with no path beyond "/".
func daemonURL(addr string) (string, error) {
	if !strings.Contains(addr, "://") {
		addr = "http://" + addr
	}
	u, err := url.Parse(addr)
	switch {
	case err != nil:
		return "", fmt.Errorf("-addr %q: want host:port or http://host:port: %w", addr, err)
	case u.Scheme != "http" && u.Scheme != "https":
		return "", fmt.Errorf("-addr %q: the daemon speaks http, not %s: want host:port or http://host:port", addr, u.Scheme)
	case u.Host == "":
		return "", fmt.Errorf("-addr %q has no host: want host:port or http://host:port", addr)
	case u.Path != "" && u.Path != "/" || u.RawQuery != "" || u.Fragment != "" || u.User != nil:
		return "", fmt.Errorf("-addr %q: give only the daemon's address (host:port or http://host:port), not a path or query", addr)
	}
	return u.Scheme + "://" + u.Host, nil
}
