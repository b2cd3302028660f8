package main

import (
	"bytes"
	"context"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestUsage: plenum -h, plenum help and plenum CMD -h print the usage on
// standard output and exit 0; plenum with nothing is a usage error.
func TestUsage(t *testing.T) {
	cases := []struct {
		args     []string
		want     []string // in stdout
		wantNot  []string // not in stdout
		wantCode int
	}{
		{[]string{"-h"}, []string{"usage: plenum COMMAND", "run-start", "replay"}, nil, 0},
		{[]string{"-help"}, []string{"usage: plenum COMMAND"}, nil, 0},
		{[]string{"--help"}, []string{"usage: plenum COMMAND"}, nil, 0},
		{[]string{"help"}, []string{"usage: plenum COMMAND", "plenum COMMAND -h"}, nil, 0},
		{[]string{"help", "demo"}, []string{"usage: plenum demo", "-time-scale", "at most 100"}, nil, 0},
		{[]string{"help", "run-stop"}, []string{"usage: plenum run-stop"}, nil, 0},
		{[]string{"help", "help"}, []string{"usage: plenum COMMAND"}, nil, 0},
		{[]string{"demo", "-h"}, []string{"usage: plenum demo", "-http", "-mqtt", "-for", "-record", "-time-scale"}, nil, 0},
		{[]string{"run", "-h"}, []string{"usage: plenum run -config FILE", "-config"}, nil, 0},
		{[]string{"run", "--help"}, []string{"usage: plenum run -config FILE"}, nil, 0},
		{[]string{"check", "-h"}, []string{"usage: plenum check -config FILE", "-config"}, nil, 0},
		{[]string{"probe", "-h"}, []string{"usage: plenum probe", "-bus", "-sim", "-29bit"}, nil, 0},
		{[]string{"replay", "-h"}, []string{"usage: plenum replay", "-in", "-csv", "-summary"}, nil, 0},
		{[]string{"plot", "-h"}, []string{"usage: plenum plot", "-in", "-out", "-channels"}, nil, 0},
		{[]string{"version", "-h"}, []string{"usage: plenum version"}, nil, 0},
		{[]string{"run-start", "-h"}, []string{"usage: plenum run-start", "-addr", "-token-file", "-label", "-notes",
			"-pressure-kpa", "-temperature-c", "-humidity-percent", "PLENUM_CONTROL_TOKEN"}, nil, 0},
		// run-stop takes no label, notes or conditions: it does not list them.
		{[]string{"run-stop", "-h"}, []string{"usage: plenum run-stop", "-addr", "-token-file", "PLENUM_CONTROL_TOKEN"},
			[]string{"-label", "-notes", "-pressure-kpa", "-temperature-c", "-humidity-percent"}, 0},
		{nil, nil, []string{"usage"}, 2},
	}
	for _, c := range cases {
		var out, errb bytes.Buffer
		code := run(c.args, &out, &errb)
		if code != c.wantCode {
			t.Errorf("plenum %s exited %d, want %d (stderr %q)", strings.Join(c.args, " "), code, c.wantCode, errb.String())
		}
		if c.wantCode == 0 && errb.Len() > 0 {
			t.Errorf("plenum %s wrote to stderr: %q", strings.Join(c.args, " "), errb.String())
		}
		for _, w := range c.want {
			if !strings.Contains(out.String(), w) {
				t.Errorf("plenum %s: stdout lacks %q:\n%s", strings.Join(c.args, " "), w, out.String())
			}
		}
		for _, w := range c.wantNot {
			if strings.Contains(out.String(), w) {
				t.Errorf("plenum %s: stdout has %q:\n%s", strings.Join(c.args, " "), w, out.String())
			}
		}
	}
	// With no command the usage goes to stderr.
	var out, errb bytes.Buffer
	if run(nil, &out, &errb); !strings.Contains(errb.String(), "usage: plenum COMMAND") {
		t.Errorf("plenum alone: stderr %q", errb.String())
	}
}

// TestBadCommandLines: stray positional arguments, unknown flags and values
// out of range are refused with exit status 2 and a message that says what
// is wrong.
func TestBadCommandLines(t *testing.T) {
	cases := []struct {
		args []string
		want string // in stderr
	}{
		{[]string{"version", "extra"}, `version: unexpected argument "extra": version takes none`},
		{[]string{"run", "plenum.yaml"}, `unexpected argument "plenum.yaml"`},
		{[]string{"check", "-config", "a.yaml", "b.yaml"}, `unexpected argument "b.yaml"`},
		{[]string{"check", "a.yaml", "-config", "b.yaml"}, `unexpected argument "a.yaml"`},
		{[]string{"demo", "now"}, `unexpected argument "now"`},
		{[]string{"probe", "can0"}, `unexpected argument "can0"`},
		{[]string{"replay", "-in", "a", "b"}, `unexpected argument "b"`},
		{[]string{"plot", "-in", "a", "-out", "x.png", "b"}, `unexpected argument "b"`},
		{[]string{"run-stop", "now"}, `unexpected argument "now"`},
		{[]string{"run-start", "-addr", "127.0.0.1:1", "pull"}, `unexpected argument "pull"`},
		{[]string{"help", "demo", "run"}, "help takes at most one command"},
		{[]string{"help", "frobnicate"}, `unknown command "frobnicate"`},
		{[]string{"demo", "-frobnicate"}, "flag provided but not defined: -frobnicate (plenum demo -h lists the flags)"},
		{[]string{"run-stop", "-label", "x"}, "flag provided but not defined: -label"},
		{[]string{"run-stop", "-pressure-kpa", "99"}, "flag provided but not defined: -pressure-kpa"},
		{[]string{"demo", "-time-scale", "0"}, "-time-scale 0 is out of range: simulated seconds per real second, more than 0 and at most 100"},
		{[]string{"demo", "-time-scale", "-1"}, "-time-scale -1 is out of range"},
		{[]string{"demo", "-time-scale", "500"}, "-time-scale 500 is out of range"},
		{[]string{"demo", "-time-scale", "100.5"}, "-time-scale 100.5 is out of range"},
		{[]string{"demo", "-time-scale", "NaN"}, "-time-scale NaN is out of range"},
		{[]string{"demo", "-time-scale", "+Inf"}, "-time-scale +Inf is out of range"},
		{[]string{"demo", "-for", "-1s"}, "-for -1s is negative"},
	}
	for _, c := range cases {
		var out, errb bytes.Buffer
		if code := run(c.args, &out, &errb); code != 2 || !strings.Contains(errb.String(), c.want) {
			t.Errorf("plenum %s: exit %d, stderr %q; want 2 and %q", strings.Join(c.args, " "), code, errb.String(), c.want)
		}
		if out.Len() > 0 {
			t.Errorf("plenum %s wrote to stdout: %q", strings.Join(c.args, " "), out.String())
		}
	}
}

// fakeDaemon answers the run API as the daemon does, for the token tok.
func fakeDaemon(t *testing.T, tok string) *httptest.Server {
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.Method != http.MethodPost || (r.URL.Path != "/api/runs/start" && r.URL.Path != "/api/runs/stop") {
			http.NotFound(w, r)
			return
		}
		if r.Header.Get("Authorization") != "Bearer "+tok {
			http.Error(w, "unauthorized", http.StatusUnauthorized)
			return
		}
		w.Header().Set("Content-Type", "application/json")
		fmt.Fprintf(w, `{"request":"","ok":true,"run":%q}`, strings.TrimSuffix("r1 "+r.FormValue("label"), " "))
	}))
	t.Cleanup(srv.Close)
	return srv
}

// TestRunControlClient: -addr takes host:port or an http:// URL and refuses
// anything else clearly; a missing or refused token says how to give one.
func TestRunControlClient(t *testing.T) {
	const tok = "0123456789abcdef0123"
	srv := fakeDaemon(t, tok)
	hostport := strings.TrimPrefix(srv.URL, "http://")
	tokFile := filepath.Join(t.TempDir(), "token")
	os.WriteFile(tokFile, []byte(tok+"\n"), 0o600)
	badFile := filepath.Join(t.TempDir(), "bad-token")
	os.WriteFile(badFile, []byte("not-the-token-at-all"), 0o600)
	const howToken = "give the token of the daemon's record.control_token_file in $PLENUM_CONTROL_TOKEN or with -token-file FILE"
	cases := []struct {
		name     string
		env      string
		args     []string
		wantCode int
		want     string // in stdout when 0, else in stderr
	}{
		{"host:port", tok, []string{"run-start", "-addr", hostport, "-label", "pull 1"}, 0, `"run":"r1 pull 1"`},
		{"http URL", tok, []string{"run-start", "-addr", srv.URL, "-label", "a"}, 0, `"run":"r1 a"`},
		{"http URL with a slash", tok, []string{"run-stop", "-addr", srv.URL + "/"}, 0, `"run":"r1"`},
		{"token file", "", []string{"run-stop", "-addr", hostport, "-token-file", tokFile}, 0, `"run":"r1"`},
		{"another scheme", tok, []string{"run-stop", "-addr", "ftp://" + hostport}, 2, "the daemon speaks http, not ftp: want host:port or http://host:port"},
		{"a path", tok, []string{"run-stop", "-addr", srv.URL + "/api/runs/stop"}, 2, "give only the daemon's address (host:port or http://host:port)"},
		{"no host", tok, []string{"run-stop", "-addr", "http://"}, 2, "has no host"},
		{"no token", "", []string{"run-start", "-addr", hostport}, 2, "no control token: " + howToken},
		{"wrong token", "wrong-token-0123456789", []string{"run-start", "-addr", hostport}, 1,
			"the daemon refused the control token from $PLENUM_CONTROL_TOKEN (401 Unauthorized): " + howToken},
		{"wrong token file", "", []string{"run-stop", "-addr", hostport, "-token-file", badFile}, 1,
			"the daemon refused the control token from " + badFile + " (401 Unauthorized): " + howToken},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Setenv("PLENUM_CONTROL_TOKEN", c.env)
			var out, errb bytes.Buffer
			code := run(c.args, &out, &errb)
			got := errb.String()
			if code == 0 {
				got = out.String()
			}
			if code != c.wantCode || !strings.Contains(got, c.want) {
				t.Errorf("exit %d, stdout %q, stderr %q; want %d and %q", code, out.String(), errb.String(), c.wantCode, c.want)
			}
		})
	}
}

// TestListenAddressInUse: an address already in use names what changes
// it: the demo's flag, or the configuration key for run.
func TestListenAddressInUse(t *testing.T) {
	busy, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer busy.Close()
	addr := busy.Addr().String()
	cfgFile := func(httpAddr, mqttAddr string) string {
		s := strings.Replace(string(demoConfig), "listen: 127.0.0.1:9108", "listen: "+httpAddr, 1)
		s = strings.Replace(s, "listen: 127.0.0.1:1883", "listen: "+mqttAddr, 1)
		s += "state_dir: " + t.TempDir() + "\n"
		f := filepath.Join(t.TempDir(), "plenum.yaml")
		os.WriteFile(f, []byte(s), 0o644)
		return f
	}
	cases := []struct {
		name string
		args []string
		want string
	}{
		// -time-scale 100 is in range: the demo gets as far as listening.
		{"demo http", []string{"demo", "-time-scale", "100", "-http", addr, "-mqtt", "127.0.0.1:0"}, "is listening on " + addr + "; stop it, or give another address with -http"},
		{"demo mqtt", []string{"demo", "-http", "127.0.0.1:0", "-mqtt", addr}, "is listening on " + addr + "; stop it, or give another address with -mqtt"},
		{"run http", []string{"run", "-config", cfgFile(addr, "127.0.0.1:0")}, "stop it, or set another address in http.listen in the configuration"},
		{"run mqtt", []string{"run", "-config", cfgFile("127.0.0.1:0", addr)}, "stop it, or set another address in mqtt.listen in the configuration"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var out, errb bytes.Buffer
			log := slog.New(slog.NewTextHandler(&errb, nil))
			if code := runCommand(context.Background(), c.args, &out, &errb, log); code != 1 || !strings.Contains(errb.String(), c.want) {
				t.Errorf("exit %d, stderr %q; want 1 and %q", code, errb.String(), c.want)
			}
		})
	}
}
