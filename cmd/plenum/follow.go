package main

import (
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"log/slog"
	"os"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/fleet"
)

// followConfig turns the follow section into the follower's Config,
// reading its password and CA files; ok is false when following is off.
func followConfig(cfg *config.Config, log *slog.Logger) (fc fleet.Config, ok bool, err error) {
	f := cfg.Follow
	if f.Broker == "" {
		return fleet.Config{}, false, nil
	}
	fc = fleet.Config{Broker: f.Broker, Username: f.Username, Prefix: f.Prefix, Self: cfg.Vehicle,
		StaleAfter: time.Duration(f.StaleAfter), MaxVehicles: f.MaxVehicles, EventsKept: f.EventsKept,
		Logger: log.With("component", "follow")}
	if fc.Password, err = readSecret("follow.password_file", f.PasswordFile); err != nil {
		return fleet.Config{}, false, err
	}
	if f.CAFile != "" {
		pem, err := os.ReadFile(f.CAFile)
		if err != nil {
			return fleet.Config{}, false, fmt.Errorf("follow.ca_file: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return fleet.Config{}, false, fmt.Errorf("follow.ca_file %s: no certificates found", f.CAFile)
		}
		fc.TLS = &tls.Config{MinVersion: tls.VersionTLS12, RootCAs: pool}
	}
	return fc, true, nil
}
