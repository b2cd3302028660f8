package config

import (
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
)

// The reload decisions: what a new file changes, applied live or refused
// naming each key that needs a restart.
func TestPlanReload(t *testing.T) {
	good, err := os.ReadFile("testdata/good.yaml")
	if err != nil {
		t.Fatal(err)
	}
	base := string(good)
	old, err := Parse("plenum.yaml", good)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name          string
		edit          func(string) string
		live, restart []string
		refused       string
	}{
		{"same file", func(s string) string { return s }, nil, nil, ""},
		{"comment and layout only", func(s string) string {
			return "# a comment\n" + strings.Replace(s, "  fuel: gasoline\n", "  fuel:   gasoline # petrol\n", 1)
		}, nil, nil, ""},
		{"log level", func(s string) string { return s + "log_level: debug\n" }, []string{"log_level"}, nil, ""},
		{"serial device", func(s string) string {
			return strings.Replace(s, "/dev/serial/by-id/usb-bench-mcu", "/dev/plenum-mcu", 1)
		}, nil, []string{"serial[0].device"}, "serial[0].device changed: restart needed"},
		{"log level and a calibration", func(s string) string {
			return strings.Replace(s, "out: [20, 300]", "out: [20, 250]", 1) + "log_level: warn\n"
		}, []string{"log_level"}, []string{"serial[0].inputs[0].calibration.linear.out[1]"}, "serial[0].inputs[0].calibration.linear.out[1] changed: restart needed"},
		{"a warning added", func(s string) string {
			return s + "warnings:\n  - {name: hot_oil, rule: \"off\"}\n"
		}, nil, []string{"warnings"}, "warnings changed: restart needed"},
		{"simulator section added", func(s string) string { return s + "simulator: {time_scale: 2}\n" }, nil, []string{"simulator"}, "simulator changed: restart needed"},
		{"two keys", func(s string) string {
			return strings.Replace(strings.Replace(s, "listen: 127.0.0.1:9108", "listen: 127.0.0.1:9109", 1), "baro_kpa: 100.8", "baro_kpa: 99", 1)
		}, nil, []string{"engine.baro_kpa", "http.listen"}, "engine.baro_kpa changed: restart needed; http.listen changed: restart needed"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			nw, err := Parse("plenum.yaml", []byte(tc.edit(base)))
			if err != nil {
				t.Fatal(err)
			}
			r := PlanReload(old, nw)
			if !reflect.DeepEqual(r.Live, tc.live) || !reflect.DeepEqual(r.Restart, tc.restart) {
				t.Fatalf("PlanReload = live %q restart %q, want %q and %q", r.Live, r.Restart, tc.live, tc.restart)
			}
			if r.Refused() != tc.refused {
				t.Fatalf("Refused() = %q, want %q", r.Refused(), tc.refused)
			}
		})
	}
}

func TestParseLogLevel(t *testing.T) {
	for _, s := range []string{"", "debug", "info", "warn", "error"} {
		if _, err := ParseLogLevel(s); err != nil {
			t.Errorf("%q: %v", s, err)
		}
	}
	_, err := Parse("bad.yaml", []byte("vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nlog_level: loud\n"))
	if err == nil || !strings.Contains(err.Error(), "bad.yaml:3: log_level:") {
		t.Fatalf("log_level: loud gave %v", err)
	}
}

// A _file key may name a systemd credential; without CREDENTIALS_DIRECTORY
// it is refused at its key.
func TestExpandCredentials(t *testing.T) {
	src := "vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nmqtt:\n  broker: tcp://b:1883\n  username: car\n  password_file: $CREDENTIALS_DIRECTORY/plenum_mqtt-password\nrecord:\n  dir: /tmp/r\n  control_token_file: ${CREDENTIALS_DIRECTORY}/plenum_control-token\n  push: {url: 'http://db:8086/write?db=p&precision=ns', token_file: /etc/plenum/db-token}\n"
	cfg, err := Parse("plenum.yaml", []byte(src))
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	if err := cfg.ExpandCredentials(dir); err != nil {
		t.Fatal(err)
	}
	if want := filepath.Join(dir, "plenum_mqtt-password"); cfg.MQTT.PasswordFile != want {
		t.Errorf("mqtt.password_file = %q, want %q", cfg.MQTT.PasswordFile, want)
	}
	if want := filepath.Join(dir, "plenum_control-token"); cfg.Record.ControlTokenFile != want {
		t.Errorf("record.control_token_file = %q, want %q", cfg.Record.ControlTokenFile, want)
	}
	if cfg.Record.Push.TokenFile != "/etc/plenum/db-token" {
		t.Errorf("a plain path was changed: %q", cfg.Record.Push.TokenFile)
	}
	cfg, _ = Parse("plenum.yaml", []byte(src))
	err = cfg.ExpandCredentials("")
	if err == nil || !strings.Contains(err.Error(), "plenum.yaml:6: mqtt.password_file:") || !strings.Contains(err.Error(), "plenum.yaml:9: record.control_token_file:") {
		t.Fatalf("without CREDENTIALS_DIRECTORY: %v", err)
	}
}

// FuzzChanged: a configuration compared with itself has no changed key,
// and comparing two never panics; the keys named are those written.
func FuzzChanged(f *testing.F) {
	good, err := os.ReadFile("testdata/good.yaml")
	if err != nil {
		f.Fatal(err)
	}
	f.Add(good, append(append([]byte(nil), good...), "log_level: warn\n"...))
	f.Add(good, []byte(strings.Replace(string(good), "bench_mcu", "car_mcu", 1)))
	f.Add([]byte("vehicle: x\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\n"), []byte("vehicle: y\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\nsimulator: {}\n"))
	f.Fuzz(func(t *testing.T, a, b []byte) {
		ca, err := Parse("a.yaml", a)
		if err != nil {
			return
		}
		if ch := Changed(ca, ca); len(ch) != 0 {
			t.Fatalf("a configuration differs from itself in %q", ch)
		}
		cb, err := Parse("b.yaml", b)
		if err != nil {
			return
		}
		r := PlanReload(ca, cb)
		for _, k := range append(r.Live, r.Restart...) {
			if k == "" || strings.Contains(k, "..") {
				t.Fatalf("a changed key is named %q", k)
			}
		}
		if (len(r.Restart) == 0) != (r.Refused() == "") {
			t.Fatalf("Refused() = %q with restart keys %q", r.Refused(), r.Restart)
		}
	})
}
