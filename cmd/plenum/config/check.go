package config

import (
	"errors"
	"fmt"
	"math"
	"net"
	"net/url"
	"reflect"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/drivers/obd"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/httpserve"
)

var nameRE = regexp.MustCompile(`^[a-z][a-z0-9_]*$`)

// lineOf finds the line of the node at path (map keys and sequence indexes)
// below root, or of the deepest node found on the way.
func lineOf(root *yaml.Node, path ...any) int {
	n := root
	if n.Kind == yaml.DocumentNode && len(n.Content) > 0 {
		n = n.Content[0]
	}
	line := n.Line
	for _, p := range path {
		switch k := p.(type) {
		case string:
			if n.Kind != yaml.MappingNode {
				return line
			}
			found := false
			for i := 0; i+1 < len(n.Content); i += 2 {
				if n.Content[i].Value == k {
					line = n.Content[i].Line
					n = n.Content[i+1]
					found = true
					break
				}
			}
			if !found {
				return line
			}
		case int:
			if n.Kind != yaml.SequenceNode || k >= len(n.Content) {
				return line
			}
			n = n.Content[k]
			line = n.Line
		}
	}
	return line
}

// written tells whether the key at path is in the file (not a default).
func written(root *yaml.Node, path ...any) bool {
	n := root
	if n.Kind == yaml.DocumentNode && len(n.Content) > 0 {
		n = n.Content[0]
	}
	for _, p := range path {
		k, _ := p.(string)
		if n.Kind != yaml.MappingNode {
			return false
		}
		found := false
		for i := 0; i+1 < len(n.Content); i += 2 {
			if n.Content[i].Value == k {
				n, found = n.Content[i+1], true
				break
			}
		}
		if !found {
			return false
		}
	}
	return true
}

func fieldName(path []any) string {
	var b strings.Builder
	for _, p := range path {
		switch k := p.(type) {
		case string:
			if b.Len() > 0 {
				b.WriteByte('.')
			}
			b.WriteString(k)
		case int:
			b.WriteString("[" + strconv.Itoa(k) + "]")
		}
	}
	return b.String()
}

type checker struct {
	file string
	root *yaml.Node
	errs Errors
}

func (c *checker) fail(msg string, path ...any) {
	c.errs = append(c.errs, &Error{File: c.file, Line: lineOf(c.root, path...), Field: fieldName(path), Msg: sentence(msg)})
}

// sentence ends msg with a full stop unless it already ends a sentence.
func sentence(msg string) string {
	msg = strings.TrimSpace(msg)
	if msg == "" || strings.HasSuffix(msg, ".") || strings.HasSuffix(msg, "?") || strings.HasSuffix(msg, "!") {
		return msg
	}
	return msg + "."
}

var durationType = reflect.TypeOf(Duration(0))

// checkNumbers refuses every number that is NaN or infinite and every
// negative duration, anywhere in the configuration: none of them means
// anything in a key of Plenum's.
func checkNumbers(c *checker, v reflect.Value, path []any) {
	switch v.Kind() {
	case reflect.Pointer:
		if !v.IsNil() {
			checkNumbers(c, v.Elem(), path)
		}
	case reflect.Struct:
		t := v.Type()
		for i := 0; i < t.NumField(); i++ {
			key, ok := yamlKey(t.Field(i))
			if !ok {
				continue
			}
			checkNumbers(c, v.Field(i), append(append([]any(nil), path...), key))
		}
	case reflect.Slice, reflect.Array:
		for i := 0; i < v.Len(); i++ {
			checkNumbers(c, v.Index(i), append(append([]any(nil), path...), i))
		}
	case reflect.Float64, reflect.Float32:
		if f := v.Float(); math.IsNaN(f) || math.IsInf(f, 0) {
			c.fail(fmt.Sprintf("is %v, but it must be a finite number", f), path...)
		}
	case reflect.Int64:
		if v.Type() == durationType && v.Int() < 0 {
			c.fail(fmt.Sprintf("is %v, but a duration must not be negative", time.Duration(v.Int())), path...)
		}
	}
}

// yamlKey returns the YAML key of a decoded struct field, as the decoder
// names it; ok is false for fields that are not decoded.
func yamlKey(f reflect.StructField) (key string, ok bool) {
	if !f.IsExported() {
		return "", false
	}
	tag := f.Tag.Get("yaml")
	if tag == "-" {
		return "", false
	}
	key, _, _ = strings.Cut(tag, ",")
	if key == "" {
		key = strings.ToLower(f.Name)
	}
	return key, true
}

func (cfg *Config) check(file string, root *yaml.Node) Errors {
	c := &checker{file: file, root: root}
	checkNumbers(c, reflect.ValueOf(cfg).Elem(), nil)
	if cfg.Vehicle == "" {
		c.fail("must name the vehicle or cell (a topic segment, e.g. brackenfell-rs)", "vehicle")
	} else if strings.ContainsAny(cfg.Vehicle, "/+# ") {
		c.fail("must not contain '/', '+', '#' or spaces", "vehicle")
	}
	e := cfg.Engine
	if e.DisplacementL <= 0 || e.DisplacementL > 20 {
		c.fail("must be between 0 and 20 litres", "engine", "displacement_l")
	}
	if fuels := derive.FuelNames(); !contains(fuels, e.Fuel) {
		c.fail(fmt.Sprintf("unknown fuel %q (one of %s)", e.Fuel, strings.Join(fuels, ", ")), "engine", "fuel")
	}
	if e.VETable == nil && (e.VE <= 0 || e.VE > 1.6) {
		c.fail("needs a volumetric_efficiency in (0, 1.6] or a ve_table", "engine", "volumetric_efficiency")
	}
	if t := e.VETable; t != nil {
		checkAxis(c, t.SpeedsRPM, "engine", "ve_table", "engine_speeds_rpm")
		checkAxis(c, t.PressuresKPa, "engine", "ve_table", "manifold_pressures_kpa")
		if len(t.Values) != len(t.SpeedsRPM) {
			c.fail(fmt.Sprintf("has %d rows, want one per engine speed (%d)", len(t.Values), len(t.SpeedsRPM)), "engine", "ve_table", "values")
		}
		for i, row := range t.Values {
			if len(row) != len(t.PressuresKPa) {
				c.fail(fmt.Sprintf("has %d values, want one per pressure (%d)", len(row), len(t.PressuresKPa)), "engine", "ve_table", "values", i)
			}
			for _, v := range row {
				if v <= 0 || v > 1.6 {
					c.fail(fmt.Sprintf("value %g outside (0, 1.6]", v), "engine", "ve_table", "values", i)
					break
				}
			}
		}
	}
	if e.BaroKPa < 50 || e.BaroKPa > 110 {
		c.fail("must be between 50 and 110 kPa", "engine", "baro_kpa")
	}
	if w := e.Wideband; w != (Wideband{}) {
		if w.VoltsHigh <= w.VoltsLow || w.LambdaHigh <= w.LambdaLow || w.LambdaLow <= 0 {
			c.fail("needs volts_low < volts_high and 0 < lambda_low < lambda_high", "engine", "wideband")
		}
	}
	names := map[string]bool{}
	for i, s := range cfg.Serial {
		if s.Name == "" {
			c.fail("every serial source needs a name", "serial", i, "name")
		} else if names[s.Name] {
			c.fail(fmt.Sprintf("source name %q used twice", s.Name), "serial", i, "name")
		}
		names[s.Name] = true
		if s.Device == "" && cfg.Sim == nil {
			c.fail("needs a device path (prefer /dev/serial/by-id/...)", "serial", i, "device")
		}
		if s.Format != "framed" && s.Format != "delimited" {
			c.fail(`must be "framed" or "delimited"`, "serial", i, "format")
		}
		if s.Format == "delimited" && s.Delimiter != "" && s.Delimiter != "," && s.Delimiter != "tab" && s.Delimiter != "space" && s.Delimiter != ";" {
			c.fail(`must be ",", ";", "tab" or "space"`, "serial", i, "delimiter")
		}
		if s.ADCBits < 8 || s.ADCBits > 24 {
			c.fail("must be between 8 and 24", "serial", i, "adc_bits")
		}
		if s.Baud <= 0 {
			c.fail("must be positive", "serial", i, "baud")
		}
		fields := map[string]bool{}
		for j, in := range s.Inputs {
			p := []any{"serial", i, "inputs", j}
			if _, ok := pipeline.Standard(in.Channel); !ok {
				why := ""
				if _, ok := pipeline.Catalogued(in.Channel); ok {
					why = fmt.Sprintf(": %s is derived or read from the ECU, not wired to a microcontroller", in.Channel)
				}
				c.fail(fmt.Sprintf("unknown channel %q%s (one of %s)", in.Channel, why, strings.Join(pipeline.StandardNames(), ", ")), append(p, "channel")...)
			}
			key := in.Field
			if s.Format == "delimited" {
				if in.Column < 1 {
					c.fail("delimited inputs need a column (1-based)", append(p, "column")...)
				}
				key = strconv.Itoa(in.Column)
			} else if in.Field == "" {
				c.fail("framed inputs need the reading's field name, e.g. a0", append(p, "field")...)
			}
			if fields[key] {
				c.fail(fmt.Sprintf("field %q mapped twice", key), p...)
			}
			fields[key] = true
			checkCalibration(c, in, append(p, "calibration"))
		}
	}
	if cfg.MQTT.Broker != "embedded" {
		u, err := url.Parse(cfg.MQTT.Broker)
		if err != nil || (u.Scheme != "tcp" && u.Scheme != "ssl" && u.Scheme != "tls" && u.Scheme != "mqtt" && u.Scheme != "mqtts") || u.Host == "" {
			c.fail(`must be "embedded" or a URL such as tcp://host:1883 or ssl://host:8883`, "mqtt", "broker")
		}
	}
	_, _, mqttErr := net.SplitHostPort(cfg.MQTT.Listen)
	if mqttErr != nil {
		c.fail("must be host:port", "mqtt", "listen")
	}
	_, _, httpErr := net.SplitHostPort(cfg.HTTP.Listen)
	if httpErr != nil {
		c.fail("must be host:port", "http", "listen")
	}
	checkHTTP(c, cfg.HTTP, httpErr == nil)
	if cfg.MQTT.Broker == "embedded" && mqttErr == nil && httpErr == nil && sameListener(cfg.MQTT.Listen, cfg.HTTP.Listen) {
		if written(c.root, "http", "listen") || !written(c.root, "mqtt", "listen") {
			c.fail(fmt.Sprintf("is %s, the address of the embedded broker (mqtt.listen) too: give each listener a port of its own", cfg.HTTP.Listen), "http", "listen")
		} else {
			c.fail(fmt.Sprintf("is %s, the address of the metrics listener (http.listen) too: give each listener a port of its own", cfg.MQTT.Listen), "mqtt", "listen")
		}
	}
	checkWriters(c, cfg)
	if cfg.Record.RotateMB < 0 {
		c.fail("must not be negative (0: the default, 64)", "record", "rotate_mb")
	}
	for _, k := range []struct {
		v   float64
		key string
	}{{cfg.Turbo.TargetBoostKPa, "target_boost_kpa"}, {cfg.Turbo.FilterDropKPa, "filter_drop_kpa"}, {cfg.Turbo.WarmOilC, "warm_oil_c"}} {
		if k.v < 0 {
			c.fail("must not be negative (0: the default)", "turbo", k.key)
		}
	}
	if cfg.Record.LegacyControlToken != "" {
		c.fail("is no longer read: a secret in the configuration would be copied into every recorded run. Put the token in a file readable only by the daemon and name it in record.control_token_file", "record", "control_token")
	}
	if cfg.Record.ControlTokenFile != "" && cfg.Record.Dir == "" {
		c.fail("run commands need record.dir: a token without recording enables nothing", "record", "control_token_file")
	}
	if cfg.MQTT.MaxRateHz < 0 || cfg.MQTT.MaxRateHz > 1000 {
		c.fail("must be between 0 and 1000", "mqtt", "max_rate_hz")
	}
	if cfg.Record.MinFreeMB < 0 || cfg.Record.MinFreeMB > 1<<24 {
		c.fail("must be between 0 (default 256) and 16777216", "record", "min_free_mb")
	}
	if m := cfg.Record.Compress; m != "" && m != "gzip" && m != "off" {
		c.fail(fmt.Sprintf("is %q; it takes gzip (the default) or off", m), "record", "compress")
	}
	if r := cfg.Record.Retain; r.MaxTotalMB < 0 || r.MaxTotalMB > 1<<30 {
		c.fail("must be between 0 (no bound) and 1073741824", "record", "retain", "max_total_mb")
	}
	if r := cfg.Record.Retain; r.MaxAgeDays < 0 || r.MaxAgeDays > 100000 || r.MaxAgeDays != r.MaxAgeDays {
		c.fail("must be between 0 (no bound) and 100000", "record", "retain", "max_age_days")
	}
	if cfg.Record.Retain.On() && cfg.Record.Dir == "" {
		c.fail("retention needs record.dir: it removes recorded runs", "record", "retain")
	}
	if pu := cfg.Record.Push; pu.URL != "" {
		u, err := url.Parse(pu.URL)
		switch {
		case err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "":
			c.fail("must be an http:// or https:// write endpoint", "record", "push", "url")
		case !strings.Contains(u.RawQuery, "precision=ns"):
			c.fail("needs precision=ns in its query: the recorder writes nanosecond times", "record", "push", "url")
		}
		if cfg.Record.Dir == "" {
			c.fail("pushing needs record.dir: what is pushed is what is recorded", "record", "push")
		}
		if pu.TokenFile != "" && pu.Username != "" {
			c.fail("give either token_file or username, not both", "record", "push", "token_file")
		}
		if (pu.Username == "") != (pu.PasswordFile == "") {
			c.fail("username and password_file go together", "record", "push", "username")
		}
		if pu.MaxBacklogMB < 0 || pu.MaxBacklogMB > 1<<20 {
			c.fail("must be between 0 (default 256) and 1048576", "record", "push", "max_backlog_mb")
		}
	}
	users := map[string]bool{}
	commandUsers := 0
	for i, u := range cfg.MQTT.Users {
		if cfg.MQTT.Broker != "embedded" {
			c.fail("accounts are for the embedded broker; an external broker keeps its own", "mqtt", "users", i)
			break
		}
		if u.Name == "" || users[u.Name] || u.Name == "plenum-daemon" {
			c.fail("every user needs a unique name (plenum-daemon is taken)", "mqtt", "users", i, "name")
		}
		users[u.Name] = true
		if u.PasswordFile == "" {
			c.fail("needs a file holding the password", "mqtt", "users", i, "password_file")
		}
		if u.Commands {
			commandUsers++
		}
	}
	if cfg.MQTT.Commands {
		switch {
		case cfg.Record.Dir == "":
			c.fail("run commands need record.dir", "mqtt", "commands")
		case cfg.MQTT.Broker == "embedded" && commandUsers == 0:
			c.fail("no user may send them: give a user in mqtt.users commands: true", "mqtt", "commands")
		case cfg.MQTT.Broker != "embedded" && cfg.Record.ControlTokenFile == "":
			c.fail("with an external broker, commands need record.control_token_file: the token is carried in each command", "mqtt", "commands")
		}
	}
	if (cfg.MQTT.CertFile == "") != (cfg.MQTT.KeyFile == "") {
		c.fail("cert_file and key_file go together", "mqtt", "cert_file")
	}
	if cfg.Sim != nil && (cfg.Sim.TimeScale < 0 || cfg.Sim.TimeScale > 100) {
		c.fail("must be between 0 and 100", "simulator", "time_scale")
	}
	if cfg.Sim != nil && (cfg.Sim.FrameRateHz < 0 || cfg.Sim.FrameRateHz > 1000) {
		c.fail("must be between 0 (default 100) and 1000", "simulator", "frame_rate_hz")
	}
	for i, cn := range cfg.CAN {
		if cn.Name == "" || names[cn.Name] {
			c.fail("every source needs a unique name", "can", i, "name")
		}
		names[cn.Name] = true
		if cn.Bus == "" {
			c.fail(`needs a SocketCAN interface (can0) or "sim"`, "can", i, "bus")
		}
		if cn.Format != "11bit" && cn.Format != "29bit" {
			c.fail(`must be "11bit" or "29bit"`, "can", i, "format")
		}
		if cn.BitRate != 500000 && cn.BitRate != 250000 {
			c.fail("ISO 15765-4 uses 500000 or 250000", "can", i, "bitrate")
		}
		for j, ch := range cn.Channels {
			if _, _, ok := obd.LookupChannel(ch.Name); !ok {
				c.fail(fmt.Sprintf("unknown OBD channel %q", ch.Name), "can", i, "channels", j, "name")
			}
			if ch.RateHz <= 0 || ch.RateHz > 1000 {
				c.fail("must be between 0 and 1000", "can", i, "channels", j, "rate_hz")
			}
			if ch.Priority < 0 || ch.Priority > 9 {
				c.fail("must be between 0 and 9", "can", i, "channels", j, "priority")
			}
		}
	}
	checkFollow(c, cfg.Follow)
	if _, err := ParseLogLevel(cfg.LogLevel); err != nil {
		c.fail(err.Error(), "log_level")
	}
	if _, err := derive.ParseStandard(cfg.Power.Standard); err != nil {
		c.fail(err.Error(), "power", "standard")
	}
	for _, kv := range cfg.Display.items() {
		var u display.Units
		var pe *display.ParseError
		if err := u.Set(kv[0] + "=" + kv[1]); errors.As(err, &pe) {
			c.fail(pe.Reason, "display", kv[0])
		} else if err != nil {
			c.fail(err.Error(), "display", kv[0])
		}
	}
	seenRule := map[string]bool{}
	for i, r := range cfg.Warnings {
		if !nameRE.MatchString(r.Name) || seenRule[r.Name] {
			c.fail("needs a unique snake_case name", "warnings", i, "name")
		}
		seenRule[r.Name] = true
		if r.Rule != "off" {
			if _, err := warn.Parse(r.Name, r.Rule); err != nil {
				c.fail(err.Error(), "warnings", i, "rule")
			}
		}
	}
	sort.SliceStable(c.errs, func(i, j int) bool { return c.errs[i].Line < c.errs[j].Line })
	return c.errs
}

// brokerURL tells whether s is an MQTT broker URL Plenum's client speaks;
// tls is true for the schemes that use TLS.
func brokerURL(s string) (ok, tls bool) {
	u, err := url.Parse(s)
	if err != nil || u.Host == "" {
		return false, false
	}
	switch u.Scheme {
	case "tcp", "mqtt":
		return true, false
	case "ssl", "tls", "mqtts":
		return true, true
	}
	return false, false
}

// checkHTTP checks the TLS files and users of the http section.
func checkHTTP(c *checker, h HTTP, addrOK bool) {
	hc := httpserve.Config{Addr: h.Listen, CertFile: h.TLSCertFile, KeyFile: h.TLSKeyFile}
	for _, u := range h.Users {
		hc.Users = append(hc.Users, httpserve.User{Name: u.Name, Password: "-"})
	}
	switch err := hc.Check(); {
	case err == nil:
	case errors.Is(err, httpserve.ErrLoginWithoutTLS):
		if addrOK {
			c.fail(fmt.Sprintf("are set, but %s is reached over plain HTTP from other machines: %v", h.Listen, err), "http", "users")
		}
	case h.TLSCertFile == "" && h.TLSKeyFile != "":
		c.fail("needs http.tls_cert_file: TLS needs both the certificate and its key", "http", "tls_key_file")
	case h.TLSKeyFile == "" && h.TLSCertFile != "":
		c.fail("needs http.tls_key_file: TLS needs both the certificate and its key", "http", "tls_cert_file")
	default:
		c.fail(err.Error(), "http", "users")
	}
	for i, u := range h.Users {
		if u.PasswordFile == "" {
			c.fail("is required: the file holding the user's password", "http", "users", i, "password_file")
		}
	}
}

// checkFollow checks the follow section: the shared broker other vehicles
// are followed through.
func checkFollow(c *checker, f Follow) {
	if f.Broker == "" {
		for _, k := range []string{"username", "password_file", "ca_file", "prefix", "stale_after", "max_vehicles", "events_kept"} {
			if written(c.root, "follow", k) {
				c.fail("is set, but follow.broker is not: following other vehicles needs the broker they publish to", "follow", k)
				return
			}
		}
		return
	}
	ok, secure := brokerURL(f.Broker)
	if !ok {
		c.fail("must be the URL of the broker the other vehicles publish to, such as tcp://broker.workshop.lan:1883 or ssl://broker.workshop.lan:8883", "follow", "broker")
	}
	if f.PasswordFile != "" && f.Username == "" {
		c.fail("needs follow.username: a password logs in a user", "follow", "password_file")
	}
	if ok && f.CAFile != "" && !secure {
		c.fail("is for a broker reached over TLS: write follow.broker as ssl://host:8883", "follow", "ca_file")
	}
	if strings.ContainsAny(f.Prefix, "+# ") || strings.HasPrefix(f.Prefix, "/") || strings.HasSuffix(f.Prefix, "/") {
		c.fail("must be topic segments without '+', '#' or spaces, not beginning or ending with '/'", "follow", "prefix")
	}
	if st := time.Duration(f.StaleAfter); st < time.Second || st > time.Hour {
		c.fail(fmt.Sprintf("is %v, but must be between 1s and 1h: vehicles publish a snapshot every second by default, so less would show live vehicles stale", st), "follow", "stale_after")
	}
	if f.MaxVehicles < 0 || f.MaxVehicles > 4096 {
		c.fail("must be between 0 (default 64) and 4096", "follow", "max_vehicles")
	}
	if f.EventsKept < 0 || f.EventsKept > 1000 {
		c.fail("must be between 0 (default 20) and 1000", "follow", "events_kept")
	}
}

func checkAxis(c *checker, axis []float64, path ...any) {
	if len(axis) < 2 {
		c.fail("needs at least two points", path...)
		return
	}
	for i := 1; i < len(axis); i++ {
		if axis[i] <= axis[i-1] {
			c.fail(fmt.Sprintf("must increase strictly (%g after %g)", axis[i], axis[i-1]), append(path, i)...)
			return
		}
	}
}

func checkCalibration(c *checker, in SerialInput, p []any) {
	cal := in.Calibration
	kinds := 0
	for _, set := range []bool{cal.Linear != nil, cal.Table != nil, cal.NTCBeta != nil, cal.NTCSH != nil} {
		if set {
			kinds++
		}
	}
	if kinds != 1 {
		c.fail("needs exactly one of linear, table, ntc_beta, ntc_steinhart_hart", p...)
		return
	}
	ch, standard := pipeline.Standard(in.Channel)
	if _, err := ToCanonical(cal.Unit, ch.Unit, 0); err != nil && standard {
		c.fail(fmt.Sprintf("%v: channel %s takes one of %s", err, ch.Name, strings.Join(unitsOf(ch.Unit), ", ")), append(p, "unit")...)
	}
	switch {
	case cal.Linear != nil:
		if cal.Linear.InMV[0] == cal.Linear.InMV[1] {
			c.fail("the two in_mv points must differ", append(p, "linear", "in_mv")...)
		}
	case cal.Table != nil:
		checkAxis(c, cal.Table.InMV, append(p, "table", "in_mv")...)
		if len(cal.Table.Out) != len(cal.Table.InMV) {
			c.fail("out needs one value per in_mv point", append(p, "table", "out")...)
		}
	case cal.NTCBeta != nil:
		b := cal.NTCBeta
		if b.R0Ohm <= 0 || b.Beta <= 0 || b.PullupOhm <= 0 {
			c.fail("r0_ohm, beta_k and pullup_ohm must be positive", append(p, "ntc_beta")...)
		}
	case cal.NTCSH != nil:
		if cal.NTCSH.PullupOhm <= 0 || cal.NTCSH.B == 0 {
			c.fail("pullup_ohm must be positive and b non-zero", append(p, "ntc_steinhart_hart")...)
		}
	}
	if cal.NTCBeta != nil || cal.NTCSH != nil {
		if cal.Unit != "" && cal.Unit != "c" {
			c.fail(`thermistors give degrees Celsius: unit must be "c" or empty`, append(p, "unit")...)
		}
	}
}

func contains(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}

// unitName names a canonical unit in a sentence ("" is a plain number).
func unitName(u pipeline.Unit) string {
	if u == "" {
		return "plain numbers without a unit"
	}
	return string(u)
}

// unitsOf lists the configuration units that measure the canonical unit u.
func unitsOf(u pipeline.Unit) []string {
	var out []string
	for name, cv := range unitTable {
		if name != "" && cv.to == u {
			out = append(out, fmt.Sprintf("%q", name))
		}
	}
	sort.Strings(out)
	out = append(out, `"" (the channel's own unit)`)
	return out
}

// sameListener tells whether two host:port addresses would collide: the
// same port on the same host or on a wildcard host.
func sameListener(a, b string) bool {
	ha, pa, _ := net.SplitHostPort(a)
	hb, pb, _ := net.SplitHostPort(b)
	if pa != pb || pa == "0" {
		return false
	}
	wild := func(h string) bool { return h == "" || h == "0.0.0.0" || h == "::" }
	norm := func(h string) string {
		if h == "localhost" {
			return "127.0.0.1"
		}
		return h
	}
	return wild(ha) || wild(hb) || norm(ha) == norm(hb)
}

// checkWriters refuses a channel that two inputs write: each frame would
// hold two different values of it.
func checkWriters(c *checker, cfg *Config) {
	first := map[string][]any{}
	claim := func(name string, p []any) {
		if name == "" {
			return
		}
		if q, ok := first[name]; ok {
			c.fail(fmt.Sprintf("channel %s is already written by %s (line %d); one channel takes one input, so map this reading to another channel or remove it", name, fieldName(q), lineOf(c.root, q...)), p...)
			return
		}
		first[name] = p
	}
	for i, s := range cfg.Serial {
		for j, in := range s.Inputs {
			claim(in.Channel, []any{"serial", i, "inputs", j, "channel"})
		}
	}
	for i, cn := range cfg.CAN {
		for j, ch := range cn.Channels {
			claim(ch.Name, []any{"can", i, "channels", j, "name"})
		}
	}
}

type unitConv struct {
	to    pipeline.Unit
	scale float64
	off   float64
}

var unitTable = map[string]unitConv{
	"pa": {pipeline.Pascal, 1, 0}, "kpa": {pipeline.Pascal, 1000, 0}, "bar": {pipeline.Pascal, 1e5, 0},
	"psi": {pipeline.Pascal, 6894.757293168, 0}, // NIST SP 811: 1 psi = 6.894 757 kPa
	"c":   {pipeline.Celsius, 1, 0}, "k": {pipeline.Celsius, 1, -273.15},
	"f": {pipeline.Celsius, 5.0 / 9, -32 * 5.0 / 9},
	"v": {pipeline.Volts, 1, 0}, "mv": {pipeline.Volts, 0.001, 0},
	"ratio": {pipeline.Ratio, 1, 0}, "percent": {pipeline.Ratio, 0.01, 0},
	"rpm": {pipeline.RPM, 1, 0}, "nm": {pipeline.NewtonMetres, 1, 0}, "": {"", 1, 0},
}

// ToCanonical converts v from a config unit to the canonical unit want.
func ToCanonical(unit string, want pipeline.Unit, v float64) (float64, error) {
	cv, ok := unitTable[strings.ToLower(unit)]
	if !ok {
		return 0, fmt.Errorf("unit %q is not one Plenum knows (pa, kpa, bar, psi, c, k, f, v, mv, ratio, percent, rpm, nm)", unit)
	}
	if unit == "" {
		cv.to = want
	}
	if cv.to != want {
		return 0, fmt.Errorf("unit %q does not measure %s (it measures %s)", unit, unitName(want), unitName(cv.to))
	}
	return v*cv.scale + cv.off, nil
}
