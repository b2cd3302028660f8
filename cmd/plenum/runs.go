package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/url"
	"os"
	"os/user"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/runlist"
	"github.com/plenum-engine/plenum/pipeline/runs"
)

// cmdRunControl is `plenum run-start` and `plenum run-stop`: they ask a
// running daemon's local HTTP API, with the control token from
// PLENUM_CONTROL_TOKEN or -token-file. Only run-start takes a label, notes
// and conditions. run-start prints {"run": id}, run-stop the run's summary
// for a person (-json: as the daemon sent it, in SI units).
func cmdRunControl(verb string, args []string, stdout io.Writer) error {
	name := "run-" + verb
	what := "Starts a run in a running daemon and prints its id."
	if verb == "stop" {
		what = "Stops the run of a running daemon and prints the run's summary."
	}
	fs := newFlagSet(name, "[flags]", what+"\nThe control token (the daemon's record.control_token_file) comes from\n$PLENUM_CONTROL_TOKEN or -token-file.", stdout)
	addr, tokenFile := clientFlags(fs)
	asJSON := fs.Bool("json", false, "print the reply as JSON, in SI units (for scripts)")
	shown := unitFlags(fs, metric)
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
	rep, err := post(name, *addr, *tokenFile, "/api/runs/"+verb, form)
	if err != nil {
		return err
	}
	if rep.Summary != nil && !*asJSON {
		people, err := shown()
		if err != nil {
			return err
		}
		return runlist.WriteSummary(stdout, *rep.Summary, people)
	}
	out, _ := json.Marshal(map[string]string{"run": rep.Run})
	if rep.Summary != nil {
		out = rep.Summary.JSON()
	}
	fmt.Fprintf(stdout, "%s\n", out)
	return nil
}

// cmdWarningAck is `plenum warning-ack -rule NAME`: it acknowledges a
// raised warning in a running daemon, so that a latched one (such as
// switched_off_hot) clears once its condition has gone. The daemon records
// a warning_acknowledged event saying by whom (-by, default the user name).
func cmdWarningAck(args []string, stdout io.Writer) error {
	fs := newFlagSet("warning-ack", "-rule NAME [flags]", "Acknowledges a raised warning in a running daemon; a latched one clears once its\ncondition has gone. The control token comes from $PLENUM_CONTROL_TOKEN or -token-file.", stdout)
	addr, tokenFile := clientFlags(fs)
	rule := fs.String("rule", "", "the warning rule to acknowledge, e.g. switched_off_hot")
	by := fs.String("by", "", "who acknowledges, recorded in the event (default: the user name)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *rule == "" {
		return usageError{"warning-ack needs -rule NAME: the warning rule to acknowledge"}
	}
	who := *by
	if who == "" {
		if u, err := user.Current(); err == nil {
			who = u.Username
		}
	}
	if _, err := post("warning-ack", *addr, *tokenFile, "/api/warnings/acknowledge", url.Values{"rule": {*rule}, "by": {who}}); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "%s acknowledged\n", *rule)
	return nil
}

// clientFlags adds the flags every client command takes.
func clientFlags(fs *cmdFlags) (addr, tokenFile *string) {
	return fs.String("addr", "127.0.0.1:9108", "the daemon's HTTP address: host:port or http://host:port"),
		fs.String("token-file", "", "file holding the control token (default: $PLENUM_CONTROL_TOKEN)")
}

// post sends a command to the daemon at addr with the control token from
// tokenFile or $PLENUM_CONTROL_TOKEN, saying how to give the token when it
// is missing or refused.
func post(name, addr, tokenFile, path string, form url.Values) (runs.Reply, error) {
	base, err := runs.DaemonURL(addr)
	if err != nil {
		return runs.Reply{}, usageError{fmt.Sprintf("%s: -addr %v", name, err)}
	}
	token, src := os.Getenv("PLENUM_CONTROL_TOKEN"), "$PLENUM_CONTROL_TOKEN"
	if tokenFile != "" {
		if token, err = config.ReadSecret(name+": -token-file", tokenFile); err != nil {
			return runs.Reply{}, err
		}
		src = tokenFile
	}
	const how = "give the token of the daemon's record.control_token_file in $PLENUM_CONTROL_TOKEN or with -token-file FILE"
	if token == "" {
		return runs.Reply{}, usageError{fmt.Sprintf("%s: no control token: %s", name, how)}
	}
	rep, err := runs.Client{Base: base, Token: token}.Post(context.Background(), path, form)
	if errors.Is(err, runs.ErrUnauthorized) {
		return rep, fmt.Errorf("%s: the daemon refused the control token from %s (401 Unauthorized): %s", name, src, how)
	}
	if err != nil {
		return rep, fmt.Errorf("%s: %w", name, err)
	}
	return rep, nil
}
