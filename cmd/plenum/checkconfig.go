package main

import (
	"context"
	"errors"
	"fmt"
	"io/fs"
	"log/slog"
	"os"
	"strings"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/derived"
)

// checkReport is what checkConfig found that is no error: the built-in
// rules left out, and the files named that do not exist on this machine.
type checkReport struct {
	LeftOut  []derived.LeftOut
	Absent   []string
	Channels []pipeline.Channel // every channel the daemon would write
}

// checkConfig builds every part run builds from cfg, opening nothing (see
// build). A file the configuration names that does not exist here (check
// run on another machine than the daemon's) is not read but named in the
// report; one that exists is read as run reads it.
func checkConfig(cfg *config.Config) (checkReport, error) {
	var rep checkReport
	c := *cfg
	m := c.MQTT
	m.Users = append([]config.MQTTUser(nil), m.Users...)
	cert, key := m.CertFile, m.KeyFile
	for _, f := range []struct {
		path *string
		key  string
	}{
		{&c.Record.ControlTokenFile, "record.control_token_file"},
		{&c.Record.Push.TokenFile, "record.push.token_file"},
		{&c.Record.Push.PasswordFile, "record.push.password_file"},
		{&m.PasswordFile, "mqtt.password_file"},
		{&m.CAFile, "mqtt.ca_file"}, {&m.CertFile, "mqtt.cert_file"}, {&m.KeyFile, "mqtt.key_file"},
		{&c.Follow.PasswordFile, "follow.password_file"}, {&c.Follow.CAFile, "follow.ca_file"},
	} {
		if absent(*f.path) {
			rep.Absent = append(rep.Absent, fmt.Sprintf("%s (%s)", *f.path, f.key))
			*f.path = ""
		}
	}
	if m.CertFile != cert || m.KeyFile != key {
		m.CertFile, m.KeyFile = "", "" // a client certificate is loaded as a pair
	}
	for i := range m.Users {
		if absent(m.Users[i].PasswordFile) {
			rep.Absent = append(rep.Absent, fmt.Sprintf("%s (mqtt.users[%d].password_file)", m.Users[i].PasswordFile, i))
			m.Users[i].PasswordFile = ""
		}
	}
	c.MQTT = m
	d, err := build(context.Background(), &c, slog.New(slog.DiscardHandler), false)
	if err != nil {
		return rep, err
	}
	d.close()
	rep.LeftOut, rep.Channels = d.set.LeftOut, d.reg.Channels()
	return rep, nil
}

// absent reports whether path names a file that does not exist.
func absent(path string) bool {
	_, err := os.Stat(path)
	return path != "" && errors.Is(err, fs.ErrNotExist)
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
