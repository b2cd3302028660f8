package main

import (
	"context"
	"fmt"
	"log/slog"
	"os"
	"strings"
	"sync"

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

// serviceRun is the service side of one daemon run.
type serviceRun struct {
	svc     service
	log     *slog.Logger
	n       *sdnotify.Notifier
	wd      *sdnotify.Watchdog
	level   *slog.LevelVar   // log_level, changed by a reload
	reloads *pipeline.Health // applied and refused reloads; up while the file is what runs
	cfg     *config.Config   // the configuration running, replaced by an applied reload
	up      sync.WaitGroup   // one per driver, done once it runs
}

// start filters log by cfg's log_level and prepares the notifications.
func (svc service) start(cfg *config.Config, log *slog.Logger) (*serviceRun, *slog.Logger) {
	lvl, err := config.ParseLogLevel(cfg.LogLevel)
	if err != nil {
		log.Warn("log_level", "err", err)
	}
	sm := &serviceRun{svc: svc, n: sdnotify.New(svc.notify), level: new(slog.LevelVar), reloads: pipeline.NewHealth("reload", "config"), cfg: cfg}
	sm.level.Set(lvl)
	sm.reloads.SetUp(true)
	sm.log = slog.New(loglevel.New(log.Handler(), sm.level))
	iv, err := svc.notify.WatchdogInterval()
	if err != nil {
		sm.log.Error("the service manager's watchdog settings cannot be read; no watchdog pings", "err", err)
	}
	sm.wd = &sdnotify.Watchdog{Notifier: sm.n, Interval: iv, What: "ingest loop", Log: sm.log}
	return sm, sm.log
}

// close closes the notification socket.
func (sm *serviceRun) close() { sm.n.Close() }

// extras are the service's health reports (the watchdog's only when
// the service manager asked for one) and the tests' derivations.
func (sm *serviceRun) extras() extras {
	ex := extras{reporters: []promexport.Reporter{sm.reloads}, derivations: sm.svc.derivations}
	if sm.wd.Interval > 0 {
		ex.reporters = append(ex.reporters, sm.wd)
	}
	return ex
}

// watchdog returns the watchdog's Run, probing p's ingest loop.
func (sm *serviceRun) watchdog(p *pipeline.Pipeline) func(context.Context) error {
	sm.wd.Probe = p.Probe
	return sm.wd.Run
}

// started wraps a driver's Run so that readiness waits until it runs.
func (sm *serviceRun) started(run func(context.Context) error) func(context.Context) error {
	sm.up.Add(1)
	return func(ctx context.Context) error {
		sm.up.Done()
		return run(ctx)
	}
}

// run is the service manager's part, in the drivers' stage: READY=1 once
// every driver runs and the ingest loop has answered a probe (the
// listeners are bound before the stages start), reloads on SIGHUP, and
// STOPPING=1 when the shutdown begins (this stage stops first).
func (sm *serviceRun) run(d *daemon) func(context.Context) error {
	status := fmt.Sprintf("running: vehicle %s, %d source(s), console %s/console/", d.cfg.Vehicle, len(d.srcs), d.web.URL())
	return func(ctx context.Context) error {
		defer func() {
			if err := sm.n.Stopping("stopping: flushing and closing"); err != nil {
				sm.log.Warn("the service manager was not told of the shutdown", "err", err)
			}
		}()
		up := make(chan struct{})
		go func() { sm.up.Wait(); close(up) }()
		select {
		case <-up:
		case <-ctx.Done():
			return nil
		}
		if err := d.p.Probe(ctx); err != nil {
			return nil // stopped before the ingest loop ran
		}
		if err := sm.n.Ready(status); err != nil {
			sm.log.Warn("the service manager was not told the daemon is ready", "err", err)
		}
		for {
			select {
			case <-ctx.Done():
				return nil
			case <-sm.svc.reload:
				sm.reload()
				if err := sm.n.Ready(status); err != nil {
					sm.log.Warn("the service manager was not told the reload is over", "err", err)
				}
			}
		}
	}
}

// reload reads the configuration file again and applies it if only keys
// that apply live changed; otherwise it refuses, naming the keys, and the
// daemon runs on with the configuration it has.
func (sm *serviceRun) reload() {
	path := sm.svc.configPath
	if err := sm.n.Reloading("reloading " + path); err != nil {
		sm.log.Warn("the service manager was not told of the reload", "err", err)
	}
	refuse := func(msg string, args ...any) {
		sm.reloads.Counter("refused").Add(1)
		sm.reloads.SetUp(false)
		sm.log.Error("reload refused: "+msg+"; running on with the configuration loaded before", append([]any{"config", path}, args...)...)
	}
	if path == "" {
		refuse("this daemon has no configuration file to read again")
		return
	}
	nc, err := config.Load(path)
	if err == nil {
		err = nc.ExpandCredentials(sm.svc.credentials)
	}
	if err == nil {
		_, err = checkConfig(nc)
	}
	if err != nil {
		refuse("the new file does not pass the check", "err", err)
		return
	}
	plan := config.PlanReload(sm.cfg, nc)
	if why := plan.Refused(); why != "" {
		refuse(why)
		return
	}
	lvl, _ := config.ParseLogLevel(nc.LogLevel) // checked by Load
	sm.cfg = nc
	sm.reloads.Counter("applied").Add(1)
	sm.reloads.SetUp(true)
	if len(plan.Live) == 0 {
		sm.log.Info("reload: the configuration is unchanged", "config", path)
		return
	}
	// The line saying so is written under the less strict of the two
	// levels, so that a person sees the change either way.
	raise := lvl > sm.level.Level()
	if !raise {
		sm.level.Set(lvl)
	}
	sm.log.Info("reload applied", "config", path, "changed", strings.Join(plan.Live, ","), "log_level", lvl.String())
	sm.level.Set(lvl)
}
