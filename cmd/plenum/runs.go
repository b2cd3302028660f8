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

// runsConfig converts the record section into the run controller's Config.
func runsConfig(cfg *config.Config) runs.Config {
	return runs.Config{
		Dir:          cfg.Record.Dir,
		Vehicle:      cfg.Vehicle,
		SyncEvery:    time.Duration(cfg.Record.SyncEvery),
		RotateBytes:  int64(cfg.Record.RotateMB) << 20,
		MinFreeBytes: int64(cfg.Record.MinFreeMB) << 20,
		ConfigYAML:   cfg.Raw,
		Manual:       cfg.Record.Manual,
		AutoTrigger:  cfg.Record.AutoTrigger,
		ControlToken: cfg.Record.ControlToken,
	}
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
