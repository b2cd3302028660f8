package config

import (
	"strings"
	"testing"
	"time"
)

const followBase = "vehicle: wall\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\n"

// TestFollowRefusals: each refusal of the follow section names the file,
// the line and the key.
func TestFollowRefusals(t *testing.T) {
	for _, c := range []struct{ name, yaml, want string }{
		{"a key without the broker", "follow:\n  stale_after: 10s\n",
			"bad.yaml:4: follow.stale_after: is set, but follow.broker is not"},
		{"not a broker URL", "follow:\n  broker: http://broker:1883\n",
			"bad.yaml:4: follow.broker: must be the URL of the broker the other vehicles publish to"},
		{"a host without a scheme", "follow: {broker: broker.workshop.lan}\n", "bad.yaml:3: follow.broker: must be the URL"},
		{"a password without a user", "follow:\n  broker: tcp://broker:1883\n  password_file: /etc/pw\n",
			"bad.yaml:5: follow.password_file: needs follow.username"},
		{"a CA for a plain broker", "follow:\n  broker: tcp://broker:1883\n  ca_file: /etc/ca.pem\n",
			"bad.yaml:5: follow.ca_file: is for a broker reached over TLS"},
		{"a wildcard prefix", "follow:\n  broker: tcp://broker:1883\n  prefix: shop/+\n",
			"bad.yaml:5: follow.prefix: must be topic segments without '+'"},
		{"a trailing slash", "follow:\n  broker: tcp://broker:1883\n  prefix: shop/\n", "bad.yaml:5: follow.prefix"},
		{"stale too soon", "follow:\n  broker: tcp://broker:1883\n  stale_after: 500ms\n",
			"bad.yaml:5: follow.stale_after: is 500ms, but must be between 1s and 1h"},
		{"stale negative", "follow:\n  broker: tcp://broker:1883\n  stale_after: -5s\n",
			"bad.yaml:5: follow.stale_after: is -5s, but a duration must not be negative"},
		{"too many vehicles", "follow:\n  broker: tcp://broker:1883\n  max_vehicles: 5000\n",
			"bad.yaml:5: follow.max_vehicles: must be between 0 (default 64) and 4096"},
		{"negative events", "follow:\n  broker: tcp://broker:1883\n  events_kept: -1\n",
			"bad.yaml:5: follow.events_kept: must be between 0 (default 20) and 1000"},
		{"an unknown key", "follow:\n  broker: tcp://broker:1883\n  vehicles: [a, b]\n",
			"bad.yaml:5: vehicles: unknown key in follow"},
	} {
		t.Run(c.name, func(t *testing.T) {
			_, err := Parse("bad.yaml", []byte(followBase+c.yaml))
			if err == nil || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("err = %v\nwant it to contain %q", err, c.want)
			}
		})
	}
}

// TestFollowDefaults: off without a broker; with one, the prefix is this
// daemon's own MQTT prefix and the bounds have their defaults.
func TestFollowDefaults(t *testing.T) {
	cfg, err := Parse("ok.yaml", []byte(followBase))
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Follow.Broker != "" {
		t.Fatalf("follow on by default: %+v", cfg.Follow)
	}
	cfg, err = Parse("ok.yaml", []byte(followBase+"mqtt: {prefix: shop}\nfollow:\n  broker: ssl://broker.workshop.lan:8883\n  username: wall\n  password_file: /etc/plenum/follow-password\n  ca_file: /etc/plenum/ca.pem\n"))
	if err != nil {
		t.Fatal(err)
	}
	f := cfg.Follow
	if f.Prefix != "shop" || time.Duration(f.StaleAfter) != 5*time.Second || f.MaxVehicles != 64 || f.EventsKept != 20 || f.Username != "wall" {
		t.Fatalf("defaults %+v", f)
	}
	cfg, err = Parse("ok.yaml", []byte(followBase+"follow: {broker: tcp://broker:1883, prefix: shop/east, stale_after: 10s, max_vehicles: 8, events_kept: 5}\n"))
	if err != nil {
		t.Fatal(err)
	}
	if f := cfg.Follow; f.Prefix != "shop/east" || time.Duration(f.StaleAfter) != 10*time.Second || f.MaxVehicles != 8 || f.EventsKept != 5 {
		t.Fatalf("decoded %+v", f)
	}
}
