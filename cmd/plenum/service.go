package main

import (
	"log/slog"
	"os"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/loglevel"
	"github.com/plenum-engine/plenum/pipeline/promexport"
	"github.com/plenum-engine/plenum/pipeline/sdnotify"
)

// service is what the service manager gives the daemon: where to notify,
// reload requests and the file to reload. The zero value (the demo, most
// tests) notifies nothing and never reloads.
type service struct {
	notify      sdnotify.Config       // from the environment (cmdRun)
	reload      <-chan os.Signal      // SIGHUP; nil: no reloads
	configPath  string                // the file a reload reads
	credentials string                // $CREDENTIALS_DIRECTORY, for the reloaded file
	derivations []pipeline.Derivation // tests only: e.g. one that stalls the ingest loop
}

// start filters log by cfg's log_level and prepares the service manager's
// part (sdnotify.Service): notifications, the watchdog of the ingest loop,
// and reloads of svc.configPath starting from cfg.
func (svc service) start(cfg *config.Config, log *slog.Logger) (*sdnotify.Service, *slog.Logger) {
	lvl, err := config.ParseLogLevel(cfg.LogLevel)
	if err != nil {
		log.Warn("log_level", "err", err)
	}
	level := new(slog.LevelVar)
	level.Set(lvl)
	log = slog.New(loglevel.New(log.Handler(), level))
	sm := sdnotify.NewService(svc.notify, log)
	sm.Watchdog.What = "ingest loop"
	sm.Reloads, sm.ConfigPath, sm.Level = svc.reload, svc.configPath, level
	sm.Reload = func() (sdnotify.Reloaded, error) {
		nc, live, err := svc.reloadOver(cfg)
		if err != nil {
			return sdnotify.Reloaded{}, err
		}
		cfg = nc
		lvl, _ := config.ParseLogLevel(nc.LogLevel) // checked by Load
		return sdnotify.Reloaded{Changed: live, Level: lvl}, nil
	}
	return sm, log
}

// extras are the service's health reports (the watchdog's only when the
// service manager asked for one) and the tests' derivations.
func (svc service) extras(sm *sdnotify.Service) extras {
	ex := extras{reporters: []promexport.Reporter{sm}, derivations: svc.derivations}
	if sm.Watchdog.Interval > 0 {
		ex.reporters = append(ex.reporters, sm.Watchdog)
	}
	return ex
}

// reloadOver reads svc.configPath again and returns it with the keys that
// changed from cur, if only keys that apply live changed; otherwise a
// *sdnotify.Refusal says why, naming the keys.
func (svc service) reloadOver(cur *config.Config) (*config.Config, []string, error) {
	if svc.configPath == "" {
		return nil, nil, &sdnotify.Refusal{Why: "this daemon has no configuration file to read again"}
	}
	nc, err := config.Load(svc.configPath)
	if err == nil {
		err = nc.ExpandCredentials(svc.credentials)
	}
	if err == nil {
		_, err = checkConfig(nc)
	}
	if err != nil {
		return nil, nil, &sdnotify.Refusal{Why: "the new file does not pass the check", Err: err}
	}
	plan := config.PlanReload(cur, nc)
	if why := plan.Refused(); why != "" {
		return nil, nil, &sdnotify.Refusal{Why: why}
	}
	return nc, plan.Live, nil
}
