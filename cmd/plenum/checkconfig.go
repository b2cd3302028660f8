package main

import (
	"errors"
	"fmt"
	"io/fs"
	"log/slog"
	"os"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/derived"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
	"github.com/plenum-engine/plenum/pipeline/promexport"
	"github.com/plenum-engine/plenum/pipeline/runs"
)

// checkConfig builds what run builds from cfg — the sources' decoders and
// channels, the derivations and warning rules and their graph, the run
// controller and the publishers, with every secret they read — without
// opening a device, a bus or a socket. It returns the warning rules left
// out for want of channels and the files named that are absent here, or
// what run would refuse, naming file:line and field where the fault has a
// key. Both `check` and `run` call it, so that whatever check accepts, run
// starts (given the files it names absent).
func checkConfig(cfg *config.Config) (rep checkReport, err error) {
	reg := pipeline.NewRegistry()
	for i, sc := range cfg.Serial {
		for j, in := range sc.Inputs {
			if _, err := sc.Sensor(in); err != nil {
				return rep, cfg.At(fmt.Sprintf("the calibration does not work: %v", err), "serial", i, "inputs", j, "calibration")
			}
		}
		if _, _, err := serialDecoder(i, sc, reg); err != nil {
			return rep, cfg.At(err.Error(), "serial", i)
		}
	}
	for i, cc := range cfg.CAN {
		if cc.Bus == "sim" && cfg.Sim == nil {
			return rep, cfg.At(`the simulated bus needs the simulated engine: add a simulator section (simulator: {}) or name a SocketCAN interface such as can0`, "can", i, "bus")
		}
		// The channels are registered and the poller prepared exactly as
		// run does, on a virtual bus that nothing else reads.
		bus, err := can.NewVirtualBus(can.VirtualConfig{BitRate: cc.BitRate})
		if err != nil {
			return rep, cfg.At(err.Error(), "can", i)
		}
		src, err := obdcan.NewSource(bus.NewNode(), reg, cc.OBD())
		if err == nil {
			src.Close()
		}
		bus.Close()
		if err != nil {
			return rep, cfg.At(err.Error(), "can", i)
		}
	}
	ds, set, err := buildAll(cfg, reg)
	if err != nil {
		return rep, err
	}
	g, err := pipeline.BuildGraph(reg, ds)
	if err != nil {
		return rep, cfg.At(fmt.Sprintf("the derivations do not fit together: %v", err), "engine")
	}
	if bad := pipeline.CheckCatalogued(reg); len(bad) > 0 {
		return rep, cfg.At(fmt.Sprintf("channels without an entry in the channel catalogue, or with another unit: %s", strings.Join(bad, ", ")))
	}
	p := pipeline.New(reg, g, pipeline.Options{})

	// The files the daemon reads at start-up: each one present here is
	// read as run reads it; one absent here (check run on another machine
	// than the daemon's) is named in the report.
	present := func(path string, key ...any) bool {
		if path == "" {
			return false
		}
		if _, err := os.Stat(path); errors.Is(err, fs.ErrNotExist) {
			rep.Absent = append(rep.Absent, fmt.Sprintf("%s (%s)", path, strings.Trim(fmt.Sprint(key...), "[]")))
			return false
		}
		return true
	}
	secret := func(path string, key ...any) error {
		if !present(path, keyName(key)) {
			return nil
		}
		if _, err := config.ReadSecret(keyName(key), path); err != nil {
			return cfg.At(config.SecretProblem(err), key...)
		}
		return nil
	}
	// The run controller, with the control token read from its file.
	var parts []promexport.Reporter
	if cfg.Record.Dir != "" {
		c := *cfg
		if !present(cfg.Record.ControlTokenFile, "record.control_token_file") {
			c.Record.ControlTokenFile = ""
		}
		rc, err := c.Runs()
		if err != nil {
			return rep, err
		}
		parts = append(parts, runs.New(rc, runs.Deps{Registry: reg, Sub: p.Subscribe("recorder", 16)}))
	}
	// The publisher and the secrets it and the broker read.
	mcfg := mqttpub.Config{Prefix: cfg.MQTT.Prefix, Vehicle: cfg.Vehicle, MaxRate: cfg.MQTT.MaxRateHz,
		SnapshotEvery: time.Duration(cfg.MQTT.SnapshotEvery), Broker: cfg.MQTT.Broker}
	if cfg.MQTT.Broker == "embedded" {
		mcfg.Broker = "tcp://" + cfg.MQTT.Listen
		for i, u := range cfg.MQTT.Users {
			if err := secret(u.PasswordFile, "mqtt", "users", i, "password_file"); err != nil {
				return rep, err
			}
		}
	} else {
		if err := secret(cfg.MQTT.PasswordFile, "mqtt", "password_file"); err != nil {
			return rep, err
		}
		m := cfg.MQTT
		for _, f := range []*string{&m.CAFile, &m.CertFile, &m.KeyFile} {
			if !present(*f, "mqtt TLS") {
				m.CAFile, m.CertFile, m.KeyFile = "", "", ""
			}
		}
		if mcfg.TLS, err = m.TLSConfig(); err != nil {
			return rep, cfg.At(fmt.Sprintf("the TLS files do not load: %v", err), "mqtt", "ca_file")
		}
	}
	pub, err := mqttpub.New(mcfg, reg, p.Subscribe("mqtt", 16))
	if err != nil {
		return rep, cfg.At(err.Error(), "mqtt")
	}
	parts = append(parts, pub)
	if pu := cfg.Record.Push; pu.URL != "" {
		if err := secret(pu.TokenFile, "record", "push", "token_file"); err != nil {
			return rep, err
		}
		if err := secret(pu.PasswordFile, "record", "push", "password_file"); err != nil {
			return rep, err
		}
	}
	if _, err := promexport.New(p, time.Now, parts...); err != nil {
		return rep, cfg.At(fmt.Sprintf("the metrics cannot be served: %v", err))
	}
	rep.LeftOut = set.LeftOut
	return rep, nil
}

// checkReport is what checkConfig found that is no error: the built-in
// rules left out, and the files named that do not exist on this machine.
type checkReport struct {
	LeftOut []derived.LeftOut
	Absent  []string
}

// keyName writes a key path as the configuration reference does.
func keyName(key []any) string {
	var b strings.Builder
	for _, k := range key {
		switch v := k.(type) {
		case int:
			fmt.Fprintf(&b, "[%d]", v)
		default:
			if b.Len() > 0 {
				b.WriteByte('.')
			}
			fmt.Fprint(&b, v)
		}
	}
	return b.String()
}

// logLeftOut names, in one info line each, the built-in warning rules left
// out because the setup lacks channels they read.
func logLeftOut(log *slog.Logger, leftOut []derived.LeftOut) {
	for _, r := range leftOut {
		log.Info("built-in warning rule left out: this setup neither measures nor derives the channels it reads", "rule", r.Rule, "missing", strings.Join(r.Missing, ","))
	}
}

// buildError places an error of derived.Build at the configuration key it
// comes from.
func buildError(cfg *config.Config, err error) error {
	var rce *derived.RuleChannelError
	switch msg := err.Error(); {
	case errors.As(err, &rce):
		return cfg.At(rce.Error(), "warnings", rce.Index, "rule")
	case strings.HasPrefix(msg, "turbo"):
		return cfg.At(msg, "turbo")
	case strings.HasPrefix(msg, "power"):
		return cfg.At(msg, "power", "standard")
	case strings.HasPrefix(msg, "warning"):
		return cfg.At(msg, "warnings")
	default:
		return cfg.At(msg, "engine")
	}
}
