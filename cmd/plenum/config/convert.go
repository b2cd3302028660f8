package config

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/drivers/calib"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/serial"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/broker"
	"github.com/plenum-engine/plenum/pipeline/console"
	"github.com/plenum-engine/plenum/pipeline/derived"
	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/fleet"
	"github.com/plenum-engine/plenum/pipeline/httpserve"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/retention"
	"github.com/plenum-engine/plenum/pipeline/runs"
	"github.com/plenum-engine/plenum/pipeline/tsdbpush"
)

// The configuration converted into each part's own Config, in canonical
// units, with the secrets its files name read. The binary only wires what
// these return.

// ReadSecret reads a password or token file (surrounding white space
// trimmed); an empty path gives an empty secret. Secrets are never kept in
// the configuration itself.
func ReadSecret(field, path string) (string, error) {
	if path == "" {
		return "", nil
	}
	b, err := os.ReadFile(path)
	if err != nil {
		return "", fmt.Errorf("%s: %w", field, err)
	}
	return strings.TrimSpace(string(b)), nil
}

// SecretProblem says in a sentence why a secret file could not be read.
func SecretProblem(err error) string {
	return fmt.Sprintf("the file cannot be read (%v); the daemon reads it at start-up", err)
}

// Derived converts the engine, power, turbo and warning sections into
// pipeline/derived's configuration.
func (c *Config) Derived() derived.Config {
	e := c.Engine
	dc := derived.Config{
		Displacement:  e.DisplacementL / 1000,
		VE:            e.VE,
		Baro:          e.BaroKPa * 1000,
		Wideband:      derive.Wideband{VoltsLow: e.Wideband.VoltsLow, LambdaLow: e.Wideband.LambdaLow, VoltsHigh: e.Wideband.VoltsHigh, LambdaHigh: e.Wideband.LambdaHigh},
		Fuel:          e.Fuel,
		PowerStandard: c.Power.Standard,
		Turbo: derived.Turbo{
			TargetBoost: c.Turbo.TargetBoostKPa * 1000,
			FilterDrop:  c.Turbo.FilterDropKPa * 1000,
			WarmOil:     c.Turbo.WarmOilC,
			CoolDownTau: time.Duration(c.Turbo.CoolDownTau),
		},
	}
	if t := e.VETable; t != nil {
		tb := &derive.VETable{Speeds: t.SpeedsRPM, Values: t.Values}
		for _, p := range t.PressuresKPa {
			tb.Pressures = append(tb.Pressures, p*1000)
		}
		dc.VETable = tb
	}
	if c.StateDir != "" {
		dc.Turbo.StatePath = filepath.Join(c.StateDir, "turbo-"+c.Vehicle+".json")
	}
	for _, r := range c.Warnings {
		dc.Warnings = append(dc.Warnings, warn.Text{Name: r.Name, Rule: r.Rule})
	}
	return dc
}

// Sensor converts an input's calibration into the driver's, in the
// canonical unit of the catalogue channel it feeds.
func (s Serial) Sensor(in SerialInput) (calib.Sensor, error) {
	ch, _ := pipeline.Standard(in.Channel)
	c := in.Calibration
	cs := calib.Sensor{ADCMax: float64(int(1)<<s.ADCBits - 1), RefMV: s.ADCRefMV}
	if c.FaultBelow != nil {
		cs.FaultBelowMV = *c.FaultBelow
	}
	if c.FaultAbove != nil {
		cs.FaultAboveMV = *c.FaultAbove
	}
	conv := func(v float64) (float64, error) { return ToCanonical(c.Unit, ch.Unit, v) }
	div := calib.Divider{PullupOhm: 0, RefMV: s.ADCRefMV}
	switch {
	case c.Linear != nil:
		o0, err := conv(c.Linear.Out[0])
		if err != nil {
			return cs, err
		}
		o1, _ := conv(c.Linear.Out[1])
		cs.Curve = calib.Linear{MV0: c.Linear.InMV[0], Out0: o0, MV1: c.Linear.InMV[1], Out1: o1}
	case c.Table != nil:
		out := make([]float64, len(c.Table.Out))
		for i, v := range c.Table.Out {
			var err error
			if out[i], err = conv(v); err != nil {
				return cs, err
			}
		}
		t, err := calib.NewTable(c.Table.InMV, out)
		if err != nil {
			return cs, err
		}
		cs.Curve = t
	case c.NTCBeta != nil:
		div.PullupOhm = c.NTCBeta.PullupOhm
		cs.Curve = calib.NTCBeta{Divider: div, R0Ohm: c.NTCBeta.R0Ohm, T0C: c.NTCBeta.T0C, Beta: c.NTCBeta.Beta}
	case c.NTCSH != nil:
		div.PullupOhm = c.NTCSH.PullupOhm
		cs.Curve = calib.NTCSteinhartHart{Divider: div, A: c.NTCSH.A, B: c.NTCSH.B, C: c.NTCSH.C}
	}
	if c.Range != nil {
		lo, err := conv(c.Range[0])
		if err != nil {
			return cs, err
		}
		hi, _ := conv(c.Range[1])
		cs.Min, cs.Max = lo, hi
	}
	return cs, cs.Validate()
}

// OBD converts a CAN section into the OBD source's configuration.
func (cc CAN) OBD() obdcan.Config {
	format := obd.ID11
	if cc.Format == "29bit" {
		format = obd.ID29
	}
	sc := obdcan.Config{Name: cc.Name, Format: format, SinglePID: cc.SinglePID}
	for _, ch := range cc.Channels {
		sc.Channels = append(sc.Channels, obdcan.Channel{Name: ch.Name, RateHz: ch.RateHz, Priority: ch.Priority})
	}
	return sc
}

// minTokenLen is the shortest control token accepted: 16 characters of a
// generated token (openssl rand -hex 16 gives 32) are beyond guessing.
const minTokenLen = 16

// Runs converts the record section into the run controller's Config,
// reading the control token from record.control_token_file (a token already
// set, by a test, wins; the example's placeholder, an empty file and a
// token too short to be safe are refused). auto_trigger alone means runs
// are started by the trigger, not at start-up.
func (c *Config) Runs() (runs.Config, error) {
	tok := c.Record.ControlToken
	if tok == "" && c.Record.ControlTokenFile != "" {
		var err error
		if tok, err = ReadSecret("record.control_token_file", c.Record.ControlTokenFile); err != nil {
			return runs.Config{}, c.At(SecretProblem(err), "record", "control_token_file")
		}
		f := c.Record.ControlTokenFile
		switch {
		case strings.Contains(strings.ToLower(tok), "change-me") || strings.Contains(strings.ToLower(tok), "changeme"):
			return runs.Config{}, c.At(fmt.Sprintf("%s holds the example's placeholder token, which anyone can read in the example: write a random one, e.g. openssl rand -hex 16 > %s", f, f), "record", "control_token_file")
		case len(tok) < minTokenLen:
			return runs.Config{}, c.At(fmt.Sprintf("%s holds a token of %d characters; a control token needs at least %d, e.g. from openssl rand -hex 16", f, len(tok), minTokenLen), "record", "control_token_file")
		}
	}
	return runs.Config{
		Dir:          c.Record.Dir,
		Vehicle:      c.Vehicle,
		SyncEvery:    time.Duration(c.Record.SyncEvery),
		RotateBytes:  int64(c.Record.RotateMB) << 20,
		MinFreeBytes: int64(c.Record.MinFreeMB) << 20,
		ConfigYAML:   c.Raw,
		Manual:       c.Record.Manual || c.Record.AutoTrigger,
		AutoTrigger:  c.Record.AutoTrigger,
		ControlToken: tok,
		StartLabel:   c.Record.StartLabel,
	}, nil
}

// Compressor converts record.compress into the compressor's Config; ok is
// false without recording or with compress: off.
func (c *Config) Compressor(log *slog.Logger) (cc record.CompressorConfig, ok bool) {
	if c.Record.Dir == "" || c.Record.Compress == "off" {
		return cc, false
	}
	return record.CompressorConfig{Dir: c.Record.Dir, Log: log.With("component", "compress")}, true
}

// Retention converts record.retain into the keeper's Config (without its
// Current, which the binary sets); ok is false when no limit is set.
func (c *Config) Retention(log *slog.Logger) (rc retention.Config, ok bool) {
	r := c.Record.Retain
	if c.Record.Dir == "" || !r.On() {
		return rc, false
	}
	minFree := int64(c.Record.MinFreeMB) << 20
	if minFree == 0 {
		minFree = runs.DefaultMinFreeBytes
	}
	return retention.Config{
		Dir: c.Record.Dir,
		Policy: retention.Policy{
			MaxTotalBytes: int64(r.MaxTotalMB) << 20,
			MaxAge:        time.Duration(r.MaxAgeDays * float64(24*time.Hour)),
			NeedPushed:    c.Record.Push.URL != "",
		},
		MinFreeBytes: minFree,
		DiskSpace:    runs.DiskSpace,
		Log:          log.With("component", "retention"),
	}, true
}

// Push converts record.push into the pusher's Config, reading its token
// and password files; ok is false when nothing is pushed.
func (c *Config) Push(log *slog.Logger) (pc tsdbpush.Config, ok bool, err error) {
	pu := c.Record.Push
	if pu.URL == "" || c.Record.Dir == "" {
		return pc, false, nil
	}
	pc = tsdbpush.Config{URL: pu.URL, Username: pu.Username, Dir: pu.Dir, MaxBacklogBytes: int64(pu.MaxBacklogMB) << 20,
		FlushEvery: time.Duration(pu.FlushEvery), Gzip: pu.Gzip, Logger: log.With("component", "push")}
	if pc.Dir == "" {
		pc.Dir = filepath.Join(c.StateDir, "push-"+c.Vehicle)
	}
	if pc.Token, err = ReadSecret("record.push.token_file", pu.TokenFile); err != nil {
		return pc, false, err
	}
	if pc.Password, err = ReadSecret("record.push.password_file", pu.PasswordFile); err != nil {
		return pc, false, err
	}
	return pc, true, nil
}

// TLSConfig loads the external broker's CA and client certificate files;
// nil when none is configured.
func (m MQTT) TLSConfig() (*tls.Config, error) {
	if m.CAFile == "" && m.CertFile == "" {
		return nil, nil
	}
	tc, err := caConfig("mqtt ca_file", m.CAFile)
	if err != nil {
		return nil, err
	}
	if m.CertFile != "" {
		cert, err := tls.LoadX509KeyPair(m.CertFile, m.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("mqtt client certificate: %w", err)
		}
		tc.Certificates = []tls.Certificate{cert}
	}
	return tc, nil
}

// caConfig is a TLS configuration trusting the certificates of the PEM
// file at path (the system's roots when path is empty).
func caConfig(field, path string) (*tls.Config, error) {
	tc := &tls.Config{MinVersion: tls.VersionTLS12}
	if path == "" {
		return tc, nil
	}
	pem, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", field, err)
	}
	pool := x509.NewCertPool()
	if !pool.AppendCertsFromPEM(pem) {
		return nil, fmt.Errorf("%s %s: no certificates found", field, path)
	}
	tc.RootCAs = pool
	return tc, nil
}

// Fleet converts the follow section into the follower's Config, reading
// its password and CA files; ok is false when following is off.
func (c *Config) Fleet(log *slog.Logger) (fc fleet.Config, ok bool, err error) {
	f := c.Follow
	if f.Broker == "" {
		return fc, false, nil
	}
	fc = fleet.Config{Broker: f.Broker, Username: f.Username, Prefix: f.Prefix, Self: c.Vehicle,
		StaleAfter: time.Duration(f.StaleAfter), MaxVehicles: f.MaxVehicles, EventsKept: f.EventsKept,
		Logger: log.With("component", "follow")}
	if fc.Password, err = ReadSecret("follow.password_file", f.PasswordFile); err != nil {
		return fleet.Config{}, false, err
	}
	if f.CAFile != "" {
		if fc.TLS, err = caConfig("follow.ca_file", f.CAFile); err != nil {
			return fleet.Config{}, false, err
		}
	}
	return fc, true, nil
}

// Console converts the vehicle, display and engine.fuel settings into the
// console's Config: values in the configured units for people.
func (c *Config) Console(log *slog.Logger) (console.Config, error) {
	units, _ := c.Display.Units() // checked with the configuration
	people, err := display.New(display.Config{Units: units, Fuel: c.Engine.Fuel})
	if err != nil {
		return console.Config{}, c.At(err.Error(), "engine", "fuel")
	}
	return console.Config{Vehicle: c.Vehicle, Logger: log, Formatter: console.People{Formatter: people}}, nil
}

// HTTPServer converts the http section into the listener's Config, with
// the users' password files read; actions under /api/ keep their control
// token.
func (c *Config) HTTPServer() (httpserve.Config, error) {
	h := c.HTTP
	hc := httpserve.Config{Addr: h.Listen, CertFile: h.TLSCertFile, KeyFile: h.TLSKeyFile, TokenPaths: []string{"/api/"}}
	for i, u := range h.Users {
		pw, err := ReadSecret("http user "+u.Name+": password_file", u.PasswordFile)
		if err != nil {
			return hc, c.At(SecretProblem(err), "http", "users", i, "password_file")
		}
		hc.Users = append(hc.Users, httpserve.User{Name: u.Name, Password: pw})
	}
	return hc, nil
}

// Publisher converts the mqtt section into the publisher's Config, for an
// external broker with its password and TLS files read; for the embedded
// one the caller adds the broker's address and credentials.
func (c *Config) Publisher(version string, log *slog.Logger) (mqttpub.Config, error) {
	m := c.MQTT
	pc := mqttpub.Config{Prefix: m.Prefix, Vehicle: c.Vehicle, MaxRate: m.MaxRateHz, SnapshotEvery: time.Duration(m.SnapshotEvery),
		Version: version, Logger: log, Broker: m.Broker, Username: m.Username}
	if m.Broker == "embedded" {
		// The publisher's client ID is reserved for it on the embedded
		// broker: no other client can knock it off.
		pc.ClientID, pc.Broker, pc.Username = "plenum-"+c.Vehicle, "tcp://"+m.Listen, ""
		return pc, nil
	}
	var err error
	if pc.Password, err = ReadSecret("mqtt password_file", m.PasswordFile); err != nil {
		return pc, c.At(SecretProblem(err), "mqtt", "password_file")
	}
	if pc.TLS, err = m.TLSConfig(); err != nil {
		return pc, c.At(fmt.Sprintf("the TLS files do not load: %v", err), "mqtt", "ca_file")
	}
	return pc, nil
}

// Broker converts the mqtt section into the embedded broker's Config, with
// the users' password files read; daemonID is the publisher's client ID,
// reserved for it.
func (c *Config) Broker(daemonID string, log *slog.Logger) (broker.Config, error) {
	m := c.MQTT
	bc := broker.Config{Addr: m.Listen, Prefix: m.Prefix, Anonymous: m.Anonymous == nil || *m.Anonymous,
		DaemonClientID: daemonID, Logger: log}
	for i, u := range m.Users {
		pw, err := ReadSecret("mqtt user "+u.Name+": password_file", u.PasswordFile)
		if err != nil {
			return bc, c.At(SecretProblem(err), "mqtt", "users", i, "password_file")
		}
		bc.Users = append(bc.Users, broker.User{Name: u.Name, Password: pw, Commands: u.Commands})
	}
	return bc, nil
}

// WithoutAbsentFiles returns a copy of c in which every file the
// configuration names (secrets, certificates) that does not exist on this
// machine is left out, and those files with their keys: `plenum check` run
// on another machine than the daemon's reads the files that are there.
func (c *Config) WithoutAbsentFiles() (*Config, []string) {
	cp := *c
	cp.MQTT.Users = append([]MQTTUser(nil), c.MQTT.Users...)
	var gone []string
	leave := func(path *string, key string) {
		if _, err := os.Stat(*path); *path != "" && errors.Is(err, fs.ErrNotExist) {
			gone = append(gone, fmt.Sprintf("%s (%s)", *path, key))
			*path = ""
		}
	}
	cp.HTTP.Users = append([]HTTPUser(nil), c.HTTP.Users...)
	m := &cp.MQTT
	cert, key := m.CertFile, m.KeyFile
	hcert, hkey := cp.HTTP.TLSCertFile, cp.HTTP.TLSKeyFile
	for _, f := range cp.files() {
		leave(f.p, f.key())
	}
	if m.CertFile != cert || m.KeyFile != key {
		m.CertFile, m.KeyFile = "", "" // a client certificate is loaded as a pair
	}
	if cp.HTTP.TLSCertFile != hcert || cp.HTTP.TLSKeyFile != hkey {
		cp.HTTP.TLSCertFile, cp.HTTP.TLSKeyFile = "", "" // loaded as a pair
	}
	return &cp, gone
}

// DerivedError places an error of derived.Build at the configuration key
// it comes from.
func (c *Config) DerivedError(err error) error {
	var rce *derived.RuleChannelError
	switch msg := err.Error(); {
	case errors.As(err, &rce):
		return c.At(rce.Error(), "warnings", rce.Index, "rule")
	case strings.HasPrefix(msg, "turbo"):
		return c.At(msg, "turbo")
	case strings.HasPrefix(msg, "power"):
		return c.At(msg, "power", "standard")
	case strings.HasPrefix(msg, "warning"):
		return c.At(msg, "warnings")
	default:
		return c.At(msg, "engine")
	}
}

// ListenError is a listen address that is already in use: it names the
// configuration key that changes it, or the command-line flag when the
// command sets the address from one (demo's -http and -mqtt).
type ListenError struct {
	Key  string // configuration key: http.listen, mqtt.listen
	Flag string // the flag that set the address, or ""
	Addr string
	Err  error
}

// Error says who holds the address and how to choose another.
func (e *ListenError) Error() string {
	how := "set another address in " + e.Key + " in the configuration"
	if e.Flag != "" {
		how = "give another address with " + e.Flag
	}
	return fmt.Sprintf("%v: another program (or another plenum) is listening on %s; stop it, or %s", e.Err, e.Addr, how)
}

// Unwrap returns the listen error.
func (e *ListenError) Unwrap() error { return e.Err }

// ListenProblem turns err into a *ListenError when it says that addr is
// already in use.
func ListenProblem(err error, key, addr string) error {
	if errors.Is(err, syscall.EADDRINUSE) {
		return &ListenError{Key: key, Addr: addr, Err: err}
	}
	return err
}

// Decoder registers the inputs of serial section i (sc) in reg and builds
// the section's decoder, counting into the health it returns.
func (sc Serial) Decoder(i int, reg *pipeline.Registry) (*serial.Decoder, *pipeline.Health, error) {
	inputs := make([]serial.Input, 0, len(sc.Inputs))
	for j, in := range sc.Inputs {
		ch, _ := pipeline.Standard(in.Channel)
		ch.Source = sc.Name
		if in.MaxAge > 0 {
			ch.MaxAge = time.Duration(in.MaxAge)
		}
		id, err := reg.Register(ch)
		if err != nil {
			return nil, nil, fmt.Errorf("serial[%d].inputs[%d]: %w", i, j, err)
		}
		sensor, err := sc.Sensor(in)
		if err != nil {
			return nil, nil, fmt.Errorf("serial[%d].inputs[%d].calibration: %w", i, j, err)
		}
		inputs = append(inputs, serial.Input{Key: in.Field, Column: in.Column, Channel: id, Sensor: sensor})
	}
	h := pipeline.NewHealth("source", sc.Name)
	format, sep := serial.Framed, byte(',')
	if sc.Format == "delimited" {
		format = serial.Delimited
		sep = map[string]byte{"tab": '\t', "space": ' ', ";": ';', ",": ',', "": ','}[sc.Delimiter]
	}
	dec, err := serial.NewDecoder(format, sep, inputs, serial.NewCounters(h))
	if err != nil {
		return nil, nil, fmt.Errorf("serial[%d]: %w", i, err)
	}
	return dec, h, nil
}

// WriteCANStart writes, for `plenum probe`, the head of a whole configuration that `check`
// accepts and `run` starts: with -sim as it is, for a real bus once the
// vehicle and engine lines are the car's. The channels follow.
func WriteCANStart(w io.Writer, busName string, useSim, format29 bool) {
	format := "11bit"
	if format29 {
		format = "29bit"
	}
	fmt.Fprintf(w, "\n# A configuration to start from (plenum check -config FILE, then plenum run -config FILE).\n")
	if useSim {
		fmt.Fprintf(w, "vehicle: probe-sim\nengine:\n  displacement_l: 1.998 # the simulated engine's\n  volumetric_efficiency: 0.9\nsimulator: {} # the engine model the simulated ECU answers from\n")
		busName = "sim"
	} else {
		fmt.Fprintf(w, "vehicle: my-car # rename: one topic segment\nengine:\n  displacement_l: 2.0 # give your engine's\n  volumetric_efficiency: 0.85 # or a ve_table\n")
	}
	fmt.Fprintf(w, "can:\n  - name: ecu\n    bus: %s\n    format: %s\n    channels:\n", busName, format)
}
