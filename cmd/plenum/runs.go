package main

import (
	"flag"
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
		MinFreeBytes: int64(cfg.Record.MinFreeMB) << 20,
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
// PLENUM_CONTROL_TOKEN or -token-file.
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
	token := os.Getenv("PLENUM_CONTROL_TOKEN")
	if *tokenFile != "" {
		var err error
		if token, err = readSecret("run-"+verb+": -token-file", *tokenFile); err != nil {
			return err
		}
	}
	form := url.Values{"label": {*label}, "notes": {*notes}, "pressure_kpa": {*pressure}, "temperature_c": {*temp}, "humidity_percent": {*hum}}
	req, err := http.NewRequest(http.MethodPost, "http://"+*addr+"/api/runs/"+verb, strings.NewReader(form.Encode()))
	if err != nil {
		return err
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	req.Header.Set("Authorization", "Bearer "+token)
	c := &http.Client{Timeout: 10 * time.Second}
	resp, err := c.Do(req)
	if err != nil {
		return fmt.Errorf("run-%s: %w", verb, err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	if resp.StatusCode != http.StatusOK {
		return fmt.Errorf("run-%s: %s: %s", verb, resp.Status, strings.TrimSpace(string(body)))
	}
	stdout.Write(body)
	return nil
}
