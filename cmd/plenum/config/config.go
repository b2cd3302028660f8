// Package config loads and checks Plenum's YAML configuration. Unknown keys
// are errors, and every error names the file, the line and the field.
// Values are written in the units their key names (displacement_l, baro_kpa,
// ...); the loader converts them to the pipeline's canonical units.
package config

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/plenum-engine/plenum/pipeline/display"
)

// Config is the whole configuration of one daemon.
type Config struct {
	Vehicle  string        `yaml:"vehicle"`
	Engine   Engine        `yaml:"engine"`
	Serial   []Serial      `yaml:"serial"`
	MQTT     MQTT          `yaml:"mqtt"`
	HTTP     HTTP          `yaml:"http"`
	Sim      *Simulator    `yaml:"simulator"`
	Power    Power         `yaml:"power"`
	Turbo    Turbo         `yaml:"turbo"`
	Warnings []WarningRule `yaml:"warnings"`
	StateDir string        `yaml:"state_dir"` // where the turbo cool-down state survives restarts
	CAN      []CAN         `yaml:"can"`
	Record   Record        `yaml:"record"`
	Display  Display       `yaml:"display"`
	Follow   Follow        `yaml:"follow"`
	// LogLevel is the least severe log line written: debug, info
	// (default), warn or error. A reload (SIGHUP) applies it live.
	LogLevel string `yaml:"log_level"`

	// Raw is the text the configuration was parsed from.
	Raw []byte `yaml:"-"`

	file string     // the name errors give
	root *yaml.Node // the parsed document, for the lines of errors found after Parse
}

// Record configures the durable recording of every sample.
type Record struct {
	Dir       string   `yaml:"dir"`        // empty: no recording
	SyncEvery Duration `yaml:"sync_every"` // default 200ms: at most this is lost at a power cut
	RotateMB  int      `yaml:"rotate_mb"`  // default 64
	// MinFreeMB is the free-space guard: recorder_behind is raised while
	// the filesystem of dir has less free space than this (default 256,
	// some 8 minutes of the demo's channels), before the disk is full.
	MinFreeMB int `yaml:"min_free_mb"`
	// Manual: runs start and stop only on command (default: one run per
	// daemon lifetime, started at once).
	Manual bool `yaml:"manual"`
	// AutoTrigger starts a run at wide-open throttle with engine speed
	// rising and ends it once the throttle has been closed for 2 s.
	AutoTrigger bool `yaml:"auto_trigger"`
	// ControlTokenFile names the file holding the control token, which
	// enables the run commands of the HTTP API (requests carry
	// "Authorization: Bearer <token>") and guards MQTT commands. Empty:
	// the HTTP commands are off. Like every secret, the token is never in
	// the configuration itself: the configuration is copied into every run.
	ControlTokenFile string `yaml:"control_token_file"`
	// LegacyControlToken is the old record.control_token key, refused with
	// a sentence naming control_token_file.
	LegacyControlToken string `yaml:"control_token"`
	// ControlToken is the token itself, read from ControlTokenFile by the
	// binary (or set by tests); never decoded from the file.
	ControlToken string `yaml:"-"`
	// StartLabel labels the run started with the daemon (the demo's -label;
	// not a configuration key).
	StartLabel string `yaml:"-"`
	// Push sends the recorded lines to an InfluxDB-compatible write
	// endpoint as well; empty URL: off.
	Push Push `yaml:"push"`
	// Compress is how closed segments are kept: "gzip" (the default, also
	// for "") compresses each into <n>.lp.gz in the background; "off"
	// keeps them as written.
	Compress string `yaml:"compress"`
	// Retain removes old runs, oldest first; empty: every run is kept.
	Retain Retain `yaml:"retain"`
}

// Retain bounds the recorded runs. The run being recorded is never
// removed, nor, with record.push, a run the database has not acknowledged.
// With any limit set, runs are also removed while the disk's free space is
// below record.min_free_mb.
type Retain struct {
	MaxTotalMB int     `yaml:"max_total_mb"` // the runs together; 0: no bound
	MaxAgeDays float64 `yaml:"max_age_days"` // from a run's start; 0: no bound
}

// On reports whether any limit is set.
func (r Retain) On() bool { return r.MaxTotalMB > 0 || r.MaxAgeDays > 0 }

// Push configures sending the recorded line protocol over HTTP.
type Push struct {
	// URL of the write endpoint with its database and precision=ns, e.g.
	// http://db.workshop.lan:8086/write?db=plenum&precision=ns (InfluxDB 1.x,
	// VictoriaMetrics) or …/api/v2/write?org=o&bucket=b&precision=ns.
	URL          string `yaml:"url"`
	TokenFile    string `yaml:"token_file"`    // InfluxDB 2.x API token, sent as "Token …"
	Username     string `yaml:"username"`      // basic auth, with password_file
	PasswordFile string `yaml:"password_file"` //
	// Dir holds the backlog that survives restarts (default:
	// <state_dir>/push-<vehicle>); MaxBacklogMB bounds it (default 256).
	Dir          string   `yaml:"dir"`
	MaxBacklogMB int      `yaml:"max_backlog_mb"`
	FlushEvery   Duration `yaml:"flush_every"` // default 1s
	Gzip         bool     `yaml:"gzip"`
}

// CAN is one ECU connection over CAN with OBD-II requests.
type CAN struct {
	Name      string       `yaml:"name"`
	Bus       string       `yaml:"bus"`        // a SocketCAN interface such as can0, or "sim"
	Format    string       `yaml:"format"`     // "11bit" (default) or "29bit"
	BitRate   int          `yaml:"bitrate"`    // 500000 (default) or 250000; set on the interface by the system
	SinglePID bool         `yaml:"single_pid"` // never pack several PIDs into one request
	Channels  []CANChannel `yaml:"channels"`
}

// CANChannel is one OBD channel to poll at a target rate.
type CANChannel struct {
	Name     string  `yaml:"name"`     // e.g. ecu_engine_speed
	RateHz   float64 `yaml:"rate_hz"`  // target readings per second
	Priority int     `yaml:"priority"` // 0–9, higher wins ties
}

// Power configures power correction.
type Power struct {
	Standard string `yaml:"standard"` // sae_j1349 (default), iso_1585 or din_70020
}

// Follow makes the daemon follow other vehicles through a shared broker
// that they publish to (their mqtt.broker), for the console's wall view:
// one tile per vehicle. Empty Broker: off.
type Follow struct {
	Broker       string   `yaml:"broker"` // tcp://host:1883 or ssl://host:8883
	Username     string   `yaml:"username"`
	PasswordFile string   `yaml:"password_file"` // the password is never in the config itself
	CAFile       string   `yaml:"ca_file"`       // PEM certificates to trust (ssl://)
	Prefix       string   `yaml:"prefix"`        // default: mqtt.prefix
	StaleAfter   Duration `yaml:"stale_after"`   // a vehicle silent this long is shown stale; default 5s
	MaxVehicles  int      `yaml:"max_vehicles"`  // default 64
	EventsKept   int      `yaml:"events_kept"`   // per vehicle; default 20
}

// Display sets the units people read (console, CLI, plots); a browser may
// override them. Each key takes a value of pipeline/display's compact form
// of the same key; empty keeps the metric default.
type Display struct {
	Pressure    string `yaml:"pressure"`    // kPa (default), bar, psi
	Boost       string `yaml:"boost"`       // measured (default), gauge, absolute
	Temperature string `yaml:"temperature"` // C (default), F
	Power       string `yaml:"power"`       // kW (default), hp_mech, hp_metric
	Torque      string `yaml:"torque"`      // Nm (default), lbft
	MassFlow    string `yaml:"mass_flow"`   // g/s (default), kg/h, lb/min
	Mixture     string `yaml:"mixture"`     // lambda (default), afr
	Speed       string `yaml:"speed"`       // km/h (default), mph
	VolumeFlow  string `yaml:"volume_flow"` // L/h (default), gal/h
}

// items returns the keys set, in pipeline/display's compact form.
func (d Display) items() [][2]string {
	var out [][2]string
	for _, kv := range [][2]string{{"pressure", d.Pressure}, {"boost", d.Boost}, {"temperature", d.Temperature},
		{"power", d.Power}, {"torque", d.Torque}, {"mass_flow", d.MassFlow}, {"mixture", d.Mixture},
		{"speed", d.Speed}, {"volume_flow", d.VolumeFlow}} {
		if kv[1] != "" {
			out = append(out, kv)
		}
	}
	return out
}

// Units returns the configured choices as display units (Check refuses
// what this would refuse).
func (d Display) Units() (display.Units, error) {
	var u display.Units
	for _, kv := range d.items() {
		if err := u.Set(kv[0] + "=" + kv[1]); err != nil {
			return display.Units{}, err
		}
	}
	return u, nil
}

// Turbo configures the turbo detectors. Defaults are common practice, no source.
type Turbo struct {
	TargetBoostKPa float64  `yaml:"target_boost_kpa"` // lag events measure toward this; 0: the settled level
	FilterDropKPa  float64  `yaml:"filter_drop_kpa"`  // air filter loss before the compressor
	WarmOilC       float64  `yaml:"warm_oil_c"`       // oil temperature that ends the warm-up guard (default 60)
	CoolDownTau    Duration `yaml:"cool_down_tau"`    // thermal time constant (default 60s)
}

// WarningRule is a named rule in Plenum's rule syntax, or "off" to disable a
// built-in rule of that name.
type WarningRule struct {
	Name string `yaml:"name"`
	Rule string `yaml:"rule"`
}

// Engine describes the engine for the physics.
type Engine struct {
	DisplacementL float64  `yaml:"displacement_l"`
	Fuel          string   `yaml:"fuel"`
	VE            float64  `yaml:"volumetric_efficiency"`
	VETable       *VETable `yaml:"ve_table"`
	BaroKPa       float64  `yaml:"baro_kpa"` // used while no barometric channel is fresh
	Wideband      Wideband `yaml:"wideband"`
}

// VETable is volumetric efficiency over engine speed (rows) and MAP (columns).
type VETable struct {
	SpeedsRPM    []float64   `yaml:"engine_speeds_rpm"`
	PressuresKPa []float64   `yaml:"manifold_pressures_kpa"`
	Values       [][]float64 `yaml:"values"`
}

// Wideband is the linear analog output of a wideband lambda controller.
type Wideband struct {
	VoltsLow   float64 `yaml:"volts_low"`
	LambdaLow  float64 `yaml:"lambda_low"`
	VoltsHigh  float64 `yaml:"volts_high"`
	LambdaHigh float64 `yaml:"lambda_high"`
}

// Serial is one microcontroller on a serial line.
type Serial struct {
	Name      string        `yaml:"name"`
	Device    string        `yaml:"device"`
	Baud      int           `yaml:"baud"`
	Format    string        `yaml:"format"`    // "framed" (Plenum's line protocol) or "delimited"
	Delimiter string        `yaml:"delimiter"` // delimited format only: ",", "tab" or "space"
	ADCBits   int           `yaml:"adc_bits"`
	ADCRefMV  float64       `yaml:"adc_ref_mv"`
	Inputs    []SerialInput `yaml:"inputs"`
}

// SerialInput maps one reading of a microcontroller to a channel.
type SerialInput struct {
	Field       string      `yaml:"field"`  // framed: the reading's key, e.g. "a0"
	Column      int         `yaml:"column"` // delimited: 1-based column
	Channel     string      `yaml:"channel"`
	MaxAge      Duration    `yaml:"max_age"`
	Calibration Calibration `yaml:"calibration"`
}

// Calibration turns a raw reading into a physical value. Exactly one of the
// kinds is set.
type Calibration struct {
	Unit       string      `yaml:"unit"` // unit of Out values: kpa, bar, psi, pa, c, f, k, v, ratio, percent, rpm, ...
	Linear     *Linear     `yaml:"linear"`
	Table      *Table      `yaml:"table"`
	NTCBeta    *NTCBeta    `yaml:"ntc_beta"`
	NTCSH      *NTCSH      `yaml:"ntc_steinhart_hart"`
	FaultBelow *float64    `yaml:"fault_below_mv"` // open/short-circuit rails, in mV
	FaultAbove *float64    `yaml:"fault_above_mv"`
	Range      *[2]float64 `yaml:"range"` // plausible output range, in Unit
}

// Linear is a two-point calibration: raw In[0]→Out[0], In[1]→Out[1].
type Linear struct {
	InMV [2]float64 `yaml:"in_mv"`
	Out  [2]float64 `yaml:"out"`
}

// Table is an interpolated calibration over raw millivolts.
type Table struct {
	InMV []float64 `yaml:"in_mv"`
	Out  []float64 `yaml:"out"`
}

// NTCBeta is an NTC thermistor described by its Beta, read through a divider
// with a pull-up to the ADC reference.
type NTCBeta struct {
	R0Ohm     float64 `yaml:"r0_ohm"`
	T0C       float64 `yaml:"t0_c"`
	Beta      float64 `yaml:"beta_k"`
	PullupOhm float64 `yaml:"pullup_ohm"`
}

// NTCSH is an NTC thermistor described by Steinhart–Hart coefficients.
type NTCSH struct {
	A, B, C   float64
	PullupOhm float64 `yaml:"pullup_ohm"`
}

// MQTT configures publishing.
type MQTT struct {
	Broker        string   `yaml:"broker"` // "embedded" (default) or tcp://host:port, ssl://host:port
	Listen        string   `yaml:"listen"` // embedded broker's address
	Username      string   `yaml:"username"`
	PasswordFile  string   `yaml:"password_file"`
	CAFile        string   `yaml:"ca_file"`
	CertFile      string   `yaml:"cert_file"`
	KeyFile       string   `yaml:"key_file"`
	Prefix        string   `yaml:"prefix"`
	MaxRateHz     float64  `yaml:"max_rate_hz"`
	SnapshotEvery Duration `yaml:"snapshot_every"`
	// Anonymous (anonymous_read, default true) lets clients without
	// credentials read the data topics of the embedded broker; false
	// refuses every connection without credentials.
	Anonymous *bool `yaml:"anonymous_read"`
	// Users are accounts of the embedded broker, for dashboards that must
	// log in and for clients allowed to send run commands.
	Users []MQTTUser `yaml:"users"`
	// Commands makes the daemon accept run commands on
	// <prefix>/<vehicle>/cmd/run/start and …/stop (off by default).
	Commands bool `yaml:"commands"`
}

// MQTTUser is one account of the embedded broker.
type MQTTUser struct {
	Name         string `yaml:"name"`
	PasswordFile string `yaml:"password_file"` // the password is never in the config itself
	Commands     bool   `yaml:"commands"`      // may publish to …/cmd/…
}

// HTTP configures the listener of the console, the metrics and the run
// API: plain HTTP, or TLS with a certificate; with users, a login.
type HTTP struct {
	Listen      string `yaml:"listen"`
	TLSCertFile string `yaml:"tls_cert_file"` // PEM certificate with its chain; with tls_key_file: HTTPS
	TLSKeyFile  string `yaml:"tls_key_file"`
	// Users must log in (HTTP basic authentication) to every page, the
	// console's stream and the metrics; over TLS only, or on loopback.
	Users []HTTPUser `yaml:"users"`
}

// HTTPUser is one login of the HTTP listener.
type HTTPUser struct {
	Name         string `yaml:"name"`
	PasswordFile string `yaml:"password_file"` // the password is never in the config itself
}

// Simulator runs the built-in engine simulator as the serial device.
type Simulator struct {
	TimeScale float64 `yaml:"time_scale"`
	Seed      uint64  `yaml:"seed"`
	// FrameRateHz is how many frames a second the simulated microcontroller
	// writes (default 100).
	FrameRateHz float64 `yaml:"frame_rate_hz"`
}

// Duration is a time.Duration written as "250ms", "2s".
type Duration time.Duration

// UnmarshalYAML parses a Go duration string.
func (d *Duration) UnmarshalYAML(n *yaml.Node) error {
	v, err := time.ParseDuration(n.Value)
	if err != nil {
		return fmt.Errorf("line %d: %q is not a duration like 250ms or 2s", n.Line, n.Value)
	}
	*d = Duration(v)
	return nil
}

// Error is a configuration error at a place in a file.
type Error struct {
	File  string
	Line  int
	Field string
	Msg   string
}

// Error formats the error as file:line: field: message.
func (e *Error) Error() string {
	var b strings.Builder
	b.WriteString(e.File)
	if e.Line > 0 {
		b.WriteString(":" + strconv.Itoa(e.Line))
	}
	if e.Field != "" {
		b.WriteString(": " + e.Field)
	}
	b.WriteString(": " + e.Msg)
	return b.String()
}

// Errors is every problem found in one file.
type Errors []*Error

// Error joins the errors, one per line.
func (es Errors) Error() string {
	var s []string
	for _, e := range es {
		s = append(s, e.Error())
	}
	return strings.Join(s, "\n")
}

// At returns an error at the key named by path (map keys and sequence
// indexes, e.g. "warnings", 2, "rule") of the file c was parsed from, for
// problems found after Parse, when the configuration is built.
func (c *Config) At(msg string, path ...any) *Error {
	e := &Error{File: c.file, Field: fieldName(path), Msg: sentence(msg)}
	if c.root != nil {
		e.Line = lineOf(c.root, path...)
	}
	return e
}

// Load reads and checks the file at path.
func Load(path string) (*Config, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("config: %w", err)
	}
	return Parse(path, data)
}

var lineRE = regexp.MustCompile(`line (\d+): (.*)`)

// Parse decodes and checks data, naming the file as name in errors.
func Parse(name string, data []byte) (*Config, error) {
	var root yaml.Node
	dec := yaml.NewDecoder(bytes.NewReader(data))
	if err := dec.Decode(&root); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, &Error{File: name, Msg: "the configuration is empty: it needs at least vehicle and engine."}
		}
		return nil, yamlError(name, err)
	}
	var cfg Config
	dec = yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(&cfg); err != nil {
		return nil, yamlError(name, err)
	}
	cfg.defaults()
	cfg.Raw = append([]byte(nil), data...)
	cfg.file, cfg.root = name, &root
	if errs := cfg.check(name, &root); len(errs) > 0 {
		return nil, errs
	}
	return &cfg, nil
}

func yamlError(name string, err error) error {
	var te *yaml.TypeError
	var out Errors
	msgs := []string{err.Error()}
	if errors.As(err, &te) {
		msgs = te.Errors
	}
	for _, m := range msgs {
		m = strings.TrimPrefix(m, "yaml: ")
		e := &Error{File: name, Msg: m}
		if sm := lineRE.FindStringSubmatch(m); sm != nil {
			e.Line, _ = strconv.Atoi(sm[1])
			e.Msg = sm[2]
			if f := regexp.MustCompile(`field (\S+) not found in type config\.(\S+)`).FindStringSubmatch(e.Msg); f != nil {
				e.Field = f[1]
				e.Msg = "unknown key in " + strings.ToLower(f[2])
			}
		}
		e.Msg = sentence(e.Msg)
		out = append(out, e)
	}
	return out
}

func (c *Config) defaults() {
	if c.Engine.Fuel == "" {
		c.Engine.Fuel = "gasoline"
	}
	if c.Engine.BaroKPa == 0 {
		c.Engine.BaroKPa = 101.325 // ISO 2533 sea-level pressure
	}
	if c.MQTT.Broker == "" {
		c.MQTT.Broker = "embedded"
	}
	if c.MQTT.Listen == "" {
		c.MQTT.Listen = "127.0.0.1:1883"
	}
	if c.MQTT.Prefix == "" {
		c.MQTT.Prefix = "plenum"
	}
	if c.MQTT.MaxRateHz == 0 {
		c.MQTT.MaxRateHz = 10
	}
	if c.Follow.Prefix == "" {
		c.Follow.Prefix = c.MQTT.Prefix
	}
	if c.Follow.StaleAfter == 0 {
		c.Follow.StaleAfter = Duration(5 * time.Second)
	}
	if c.Follow.MaxVehicles == 0 {
		c.Follow.MaxVehicles = 64
	}
	if c.Follow.EventsKept == 0 {
		c.Follow.EventsKept = 20
	}
	if c.Power.Standard == "" {
		c.Power.Standard = "sae_j1349"
	}
	if c.StateDir == "" {
		if dir, err := os.UserCacheDir(); err == nil {
			c.StateDir = filepath.Join(dir, "plenum")
		}
	}
	if c.HTTP.Listen == "" {
		c.HTTP.Listen = "127.0.0.1:9108"
	}
	for i := range c.CAN {
		if c.CAN[i].Format == "" {
			c.CAN[i].Format = "11bit"
		}
		if c.CAN[i].BitRate == 0 {
			c.CAN[i].BitRate = 500000
		}
	}
	for i := range c.Serial {
		s := &c.Serial[i]
		if s.Baud == 0 {
			s.Baud = 115200
		}
		if s.Format == "" {
			s.Format = "framed"
		}
		if s.ADCBits == 0 {
			s.ADCBits = 10
		}
		if s.ADCRefMV == 0 {
			s.ADCRefMV = 5000
		}
	}
}
