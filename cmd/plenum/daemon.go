package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"path/filepath"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/broker"
	"github.com/plenum-engine/plenum/pipeline/console"
	"github.com/plenum-engine/plenum/pipeline/derived"
	"github.com/plenum-engine/plenum/pipeline/eventlog"
	"github.com/plenum-engine/plenum/pipeline/fleet"
	"github.com/plenum-engine/plenum/pipeline/httpserve"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
	"github.com/plenum-engine/plenum/pipeline/promexport"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/retention"
	"github.com/plenum-engine/plenum/pipeline/runs"
	"github.com/plenum-engine/plenum/pipeline/stages"
	"github.com/plenum-engine/plenum/pipeline/tsdbpush"
)

// daemon is the daemon's parts, built from a configuration but not running.
type daemon struct {
	cfg     *config.Config
	log     *slog.Logger
	reg     *pipeline.Registry
	srcs    []source
	set     *derived.Set
	p       *pipeline.Pipeline
	rr      *runs.Controller   // nil without record.dir
	pub     *mqttpub.Publisher // live values, events and summaries
	pusher  *tsdbpush.Pusher   // nil without record.push
	comp    *record.Compressor // nil without record.dir or with compress: off
	keep    *retention.Keeper  // nil without record.retain
	brk     *broker.Broker     // nil with an external broker
	follow  *fleet.Follower    // nil unless following other vehicles
	evm     *promexport.Events
	evlog   *eventlog.Events
	con     *console.Server
	mux     *http.ServeMux
	web     *httpserve.Server // the HTTP listener, not yet bound
	closers []func()          // closed in reverse order

	extraParts []promexport.Reporter // the service's health reports (watchdog, reload)
}

// close closes what build opened, in reverse order.
func (d *daemon) close() {
	for i := len(d.closers) - 1; i >= 0; i-- {
		d.closers[i]()
	}
}

// build builds every part the daemon runs from cfg. With open false
// (`plenum check`) it opens no device, bus, socket or file it would write,
// and reads every file the configuration names; run builds with open true,
// so that whatever check accepts, run starts. Errors name file:line and
// field where the fault has a key. On error nothing is left open.
func build(ctx context.Context, cfg *config.Config, log *slog.Logger, open bool) (*daemon, error) {
	return buildWith(ctx, cfg, log, open, extras{})
}

// extras are parts the service adds to what the configuration builds.
type extras struct {
	reporters   []promexport.Reporter // more health reports for the collector
	derivations []pipeline.Derivation // tests only: e.g. one that stalls the ingest loop
}

// buildWith is build with ex added.
func buildWith(ctx context.Context, cfg *config.Config, log *slog.Logger, open bool, ex extras) (_ *daemon, err error) {
	d := &daemon{cfg: cfg, log: log, reg: pipeline.NewRegistry(), mux: http.NewServeMux(), extraParts: ex.reporters}
	defer func() {
		if err != nil {
			d.close()
		}
	}()
	if err := d.buildSources(open); err != nil {
		return nil, err
	}
	ds, set, err := buildAll(cfg, d.reg)
	if err != nil {
		return nil, err
	}
	ds = append(ds, ex.derivations...)
	d.set = set
	g, err := pipeline.BuildGraph(d.reg, ds)
	if err != nil {
		return nil, cfg.At(fmt.Sprintf("the derivations do not fit together: %v", err), "engine")
	}
	if bad := pipeline.CheckCatalogued(d.reg); len(bad) > 0 {
		return nil, cfg.At(fmt.Sprintf("channels without an entry in the channel catalogue, or with another unit: %s", strings.Join(bad, ", ")))
	}
	d.p = pipeline.New(d.reg, g, pipeline.Options{})
	d.p.BindEmitters()

	// Pushing the recorded lines to a time-series database.
	pc, push, err := cfg.Push(log)
	if err != nil {
		return nil, err
	}
	if push && open {
		recDir := cfg.Record.Dir
		pc.OnPushed = func(run string, complete bool) error {
			if d.keep != nil {
				d.keep.Kick()
			}
			return record.MarkPushed(filepath.Join(recDir, run), complete)
		}
		if d.pusher, err = tsdbpush.Open(pc); err != nil {
			return nil, fmt.Errorf("record.push: %w", err)
		}
		d.closers = append(d.closers, func() { d.pusher.Close() })
	}

	// MQTT: the embedded broker unless an external one is configured.
	mcfg, err := cfg.Publisher(thisBuild().Version, log)
	if err != nil {
		return nil, err
	}
	if cfg.MQTT.Broker == "embedded" {
		bc, err := cfg.Broker(mcfg.ClientID, log)
		if err != nil {
			return nil, err
		}
		if open {
			// The broker outlives the publisher's last "offline" message: it
			// is closed after every stage has stopped.
			if d.brk, err = broker.Start(context.WithoutCancel(ctx), bc); err != nil {
				return nil, config.ListenProblem(err, "mqtt.listen", cfg.MQTT.Listen)
			}
			d.closers = append(d.closers, func() { d.brk.Close() })
			mcfg.Broker = "tcp://" + d.brk.Addr().String()
			mcfg.Username, mcfg.Password = d.brk.Credentials()
		}
	}
	if cfg.Record.Dir != "" {
		rc, err := cfg.Runs()
		if err != nil {
			return nil, err
		}
		if open {
			var cutShort func(run string) // pushed once what the backlog holds of it is acknowledged
			if d.pusher != nil {
				cutShort = d.pusher.Mark
			}
			record.RecoverAtStart(cfg.Record.Dir, log, cutShort)
		}
		if cc, ok := cfg.Compressor(log); ok {
			d.comp = record.NewCompressor(cc)
		}
		// The recorder must see every sample: a ring of several seconds.
		deps := runs.Deps{Registry: d.reg, Sub: d.p.Subscribe("recorder", 1<<18), Store: d.p.Store(), Emit: d.p.Emit, Log: log,
			Acknowledge:     func(rule, via, by string) error { return set.Acknowledge(derived.Ack{Rule: rule, Via: via, By: by}) },
			EnterConditions: func(c record.Conditions) string { return set.EnterConditions(c.Ambient()) }}
		if d.pusher != nil {
			deps.Forward = d.pusher
		}
		if d.comp != nil {
			deps.Closed = d.comp.Closed
		}
		deps.Ended = func(run string) {
			if d.pusher != nil {
				d.pusher.Mark(run)
			}
			if d.keep != nil {
				d.keep.Kick()
			}
		}
		d.rr = runs.New(rc, deps)
		if kc, ok := cfg.Retention(log); ok {
			kc.Current = d.rr.Current
			d.keep = retention.New(kc)
			if open {
				// One pass before the compressor's first look, so that it
				// does not compress runs that are about to go.
				if _, err := d.keep.Pass(); err != nil {
					log.Warn("retention at start", "err", err)
				}
			}
		}
		d.mux.Handle("/api/runs/", d.rr.Handler())
		d.mux.Handle("/api/warnings/", d.rr.Handler())
		if cfg.MQTT.Commands {
			mcfg.OnCommand = d.rr.Command
		}
	}
	if cfg.StateDir != "" && open {
		ob, err := mqttpub.OpenOutbox(filepath.Join(cfg.StateDir, "outbox-"+cfg.Vehicle), 10000)
		if err != nil {
			log.Warn("mqtt outbox unavailable; events are published without it", "err", err)
		} else {
			d.closers = append(d.closers, func() { ob.Close() })
			mcfg.Outbox = ob
		}
	}
	if d.pub, err = mqttpub.New(mcfg, d.reg, d.p.Subscribe("mqtt", 1<<14)); err != nil {
		return nil, cfg.At(err.Error(), "mqtt")
	}
	d.pub.SetStore(d.p.Store())
	if d.rr != nil {
		d.rr.SetPublish(d.pub.PublishSummary)
	}
	// The live console: its stream subscribes to the pipeline; values are
	// shown in the configured units for people.
	ccfg, err := cfg.Console(log)
	if err != nil {
		return nil, err
	}
	if d.rr != nil {
		ccfg.CurrentRun, ccfg.Controls = d.rr.Current, d.rr.Controls()
	}
	// Following other vehicles, for the wall view.
	if fc, ok, err := cfg.Fleet(log); err != nil {
		return nil, err
	} else if ok {
		if d.follow, err = fleet.New(fc); err != nil {
			return nil, cfg.At(err.Error(), "follow")
		}
		ccfg.Fleet = d.follow
	}
	d.con = console.New(ccfg, d.p)
	d.mux.Handle("/console/", d.con.Handler())
	hc, err := cfg.HTTPServer()
	if err != nil {
		return nil, err
	}
	if d.web, err = httpserve.New(hc, d.mux); err != nil {
		return nil, cfg.At(err.Error(), "http")
	}
	return d, d.serveMetrics()
}

// serveMetrics builds the Prometheus collector, every part reporting its
// health at scrape time, the event metrics and log, and the HTTP pages.
func (d *daemon) serveMetrics() error {
	parts := append([]promexport.Reporter{d.pub, d.con}, d.extraParts...)
	if d.rr != nil {
		parts = append(parts, d.rr)
	}
	if d.pusher != nil {
		parts = append(parts, d.pusher)
	}
	if d.comp != nil {
		parts = append(parts, d.comp)
	}
	if d.keep != nil {
		parts = append(parts, d.keep)
	}
	if d.brk != nil {
		parts = append(parts, d.brk)
	}
	if d.follow != nil {
		parts = append(parts, d.follow)
	}
	for _, s := range d.srcs {
		if s.health != nil {
			parts = append(parts, s.health)
		}
	}
	col, err := promexport.New(d.p, time.Now, parts...)
	if err != nil {
		return d.cfg.At(fmt.Sprintf("the metrics cannot be served: %v", err))
	}
	rules := make([]promexport.Rule, 0, len(d.set.Rules)+1)
	for _, r := range d.set.Rules {
		rules = append(rules, promexport.Rule{Name: r.Name, Severity: r.Severity})
	}
	if d.rr != nil {
		rules = append(rules, promexport.Rule{Name: "recorder_behind", Severity: "critical"})
	}
	col.WithRules(rules...)
	d.evm = promexport.NewEvents(d.p.SubscribeEvents("event_metrics"), rules...)
	// Warnings raised and cleared are logged from a subscription of their
	// own: the derivations never wait on the log.
	d.evlog = eventlog.New(eventlog.Config{Logger: d.log}, d.p.SubscribeEvents("event_log"))
	h, err := promexport.Handler(col, d.evm)
	if err != nil {
		return err
	}
	d.mux.Handle("/metrics", h)
	if ve := d.set.VETableHandler(); ve != nil {
		d.mux.Handle("/ve-table.csv", ve)
	}
	d.mux.HandleFunc("/{$}", func(w http.ResponseWriter, r *http.Request) { // "/" alone; other paths 404
		fmt.Fprintf(w, "plenum %s for %s\n/console/  live console (driver, cell, wall)\n/metrics  Prometheus exposition\n\n%s\n", thisBuild().Version, d.cfg.Vehicle, Safety)
	})
	return nil
}

// runDaemon builds the daemon's parts from cfg, starts them in stages and
// runs them until ctx is done or a part fails, then stops them in the
// reverse order: sources first, so that what they took last is processed,
// recorded, pushed and published.
func runDaemon(ctx context.Context, cfg *config.Config, stdout io.Writer, log *slog.Logger) error {
	return runDaemonWith(ctx, cfg, stdout, log, service{})
}

// runDaemonWith is runDaemon under a service manager (service.go): it
// says when the daemon is ready and stopping, pings the watchdog while the
// ingest loop turns, and reloads the configuration on request.
func runDaemonWith(ctx context.Context, cfg *config.Config, stdout io.Writer, log *slog.Logger, svc service) error {
	fmt.Fprintln(stdout, Safety)
	if cfg.StateDir != "" {
		fmt.Fprintf(stdout, "state:    %s\n", cfg.StateDir)
	}
	sm, log := svc.start(cfg, log)
	defer sm.Notifier.Close()
	d, err := buildWith(ctx, cfg, log, true, svc.extras(sm))
	if err != nil {
		return err
	}
	defer d.close()
	logLeftOut(log, d.set.LeftOut)
	if err := d.set.LoadTurboState(time.Now()); errors.Is(err, derived.ErrStateDir) {
		log.Warn("turbo state directory; the cool-down state will not survive a restart", "err", err)
	} else if err != nil {
		log.Warn("turbo state not restored", "err", err)
	}
	defer func() {
		if err := d.set.SaveTurboState(); err != nil {
			log.Warn("turbo state not saved", "err", err)
		}
	}()
	if err := d.web.Listen(); err != nil {
		return config.ListenProblem(fmt.Errorf("http listen %s: %w", cfg.HTTP.Listen, err), "http.listen", cfg.HTTP.Listen)
	}
	if d.rr != nil {
		id, err := d.rr.StartUnlessManual()
		if err != nil {
			d.web.Close()
			return err
		}
		if id != "" {
			fmt.Fprintf(stdout, "recording: %s\n", filepath.Join(cfg.Record.Dir, id))
		}
	}
	fmt.Fprintf(stdout, "console:  %s/console/\n", d.web.URL())
	fmt.Fprintf(stdout, "metrics:  %s/metrics\n", d.web.URL())
	if d.brk != nil {
		fmt.Fprintf(stdout, "mqtt:     mqtt://%s  (subscribe to %s/%s/#, read-only)\n", d.brk.Addr(), cfg.MQTT.Prefix, cfg.Vehicle)
	} else {
		fmt.Fprintf(stdout, "mqtt:     publishing to %s under %s/%s/\n", cfg.MQTT.Broker, cfg.MQTT.Prefix, cfg.Vehicle)
	}

	// Start in stages, from the last consumer to the sources; stop in
	// reverse. The recorder stops before the pusher (its last lines go into
	// the backlog) and the publisher after both (it publishes the summary).
	st := []stages.Stage{
		{{Name: "http", Run: d.web.Run}},
		{{Name: "mqtt", Run: func(ctx context.Context) error {
			if err := d.pub.Run(ctx); err != nil {
				// Recording and metrics go on without MQTT.
				log.Error("mqtt publisher stopped; live values and events are not published until a restart", "err", err)
				<-ctx.Done()
			}
			return nil
		}}, {Name: "event metrics", Run: d.evm.Run}, {Name: "event log", Run: d.evlog.Run}, {Name: "console", Run: d.con.Run}},
	}
	if d.follow != nil {
		st[1] = append(st[1], stages.Part{Name: "follow", Run: d.follow.Run})
	}
	// Compression and retention stop after the recorder and the pusher:
	// the run closed by the shutdown is compressed now.
	var storage stages.Stage
	if d.comp != nil {
		storage = append(storage, stages.Part{Name: "compress", Run: d.comp.Run})
	}
	if d.keep != nil {
		storage = append(storage, stages.Part{Name: "retention", Run: d.keep.Run})
	}
	if storage != nil {
		st = append(st, storage)
	}
	if d.pusher != nil {
		st = append(st, stages.Stage{{Name: "push", Run: d.pusher.Run}})
	}
	if d.rr != nil {
		st = append(st, stages.Stage{{Name: "recorder", Run: d.rr.Run}})
	}
	// The service manager's part: READY=1 once every driver runs and the
	// ingest loop has answered a probe (the listeners are bound before the
	// stages start), reloads, and STOPPING=1 when the shutdown begins
	// (this stage stops first).
	sm.Probe, sm.Watchdog.Probe = d.p.Probe, d.p.Probe
	sm.Status = fmt.Sprintf("running: vehicle %s, %d source(s), console %s/console/", cfg.Vehicle, len(d.srcs), d.web.URL())
	st = append(st, stages.Stage{{Name: "pipeline", Run: d.p.Run}, {Name: "watchdog", Run: sm.Watchdog.Run}})
	var drivers stages.Stage
	for _, s := range d.srcs {
		drivers = append(drivers, stages.Part{Name: s.name, Run: sm.Started(func(ctx context.Context) error { return s.run(ctx, d.p) })})
	}
	drivers = append(drivers, stages.Part{Name: "service manager", Run: sm.Run})
	return stages.Run(ctx, log, shutdownGrace, append(st, drivers)...)
}
