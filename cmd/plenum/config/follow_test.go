package config

import (
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline/fleet"
)

// TestFollowConfig: the follow section becomes the follower's Config, with
// the password read from its file and this daemon's vehicle skipped.
func TestFollowConfig(t *testing.T) {
	dir := t.TempDir()
	pw := filepath.Join(dir, "pw")
	if err := os.WriteFile(pw, []byte("s3cret\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	base := "vehicle: wall-pc\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\n"
	cfg, err := Parse("p.yaml", []byte(base))
	if err != nil {
		t.Fatal(err)
	}
	log := slog.New(slog.DiscardHandler)
	if _, on, err := cfg.Fleet(log); on || err != nil {
		t.Fatalf("following without a broker: on %v, err %v", on, err)
	}
	cfg, err = Parse("p.yaml", []byte(base+"follow: {broker: tcp://127.0.0.1:1883, username: wall, password_file: "+pw+", stale_after: 3s}\n"))
	if err != nil {
		t.Fatal(err)
	}
	fc, on, err := cfg.Fleet(log)
	if err != nil || !on {
		t.Fatalf("on %v, err %v", on, err)
	}
	if fc.Password != "s3cret" || fc.Self != "wall-pc" || fc.Prefix != "plenum" || fc.StaleAfter != 3*time.Second || fc.MaxVehicles != 64 || fc.TLS != nil {
		t.Fatalf("config %+v", fc)
	}
	if _, err := fleet.New(fc); err != nil {
		t.Fatal(err)
	}
	cfg, err = Parse("p.yaml", []byte(base+"follow: {broker: ssl://127.0.0.1:8883, ca_file: "+pw+"}\n"))
	if err != nil {
		t.Fatal(err)
	}
	if _, _, err := cfg.Fleet(log); err == nil || !strings.Contains(err.Error(), "follow.ca_file") {
		t.Fatalf("a CA file without certificates: %v", err)
	}
}
