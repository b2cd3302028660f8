package main

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/broker"
	"github.com/plenum-engine/plenum/pipeline/console"
	"github.com/plenum-engine/plenum/pipeline/derived"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
	"github.com/plenum-engine/plenum/pipeline/promexport"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/runs"
	"github.com/plenum-engine/plenum/pipeline/tsdbpush"
)

// runDaemon builds the daemon's parts from cfg, starts them in stages and
// runs them until ctx is done or a part fails, then stops them in the
// reverse order: sources first, so that what they took last is processed,
// recorded, pushed and published.
func runDaemon(ctx context.Context, cfg *config.Config, stdout io.Writer, log *slog.Logger) error {
	fmt.Fprintln(stdout, Safety)
	// Every validation of `plenum check` first, opening nothing.
	if _, err := checkConfig(cfg); err != nil {
		return err
	}
	// Build: nothing runs yet, so a failure leaves nothing to stop.
	reg := pipeline.NewRegistry()
	srcs, cleanup, err := buildSources(cfg, reg, log)
	if err != nil {
		return err
	}
	defer cleanup()
	ds, set, err := buildAll(cfg, reg)
	if err != nil {
		return err
	}
	logLeftOut(log, set.LeftOut)
	if err := set.LoadTurboState(time.Now()); errors.Is(err, derived.ErrStateDir) {
		log.Warn("turbo state directory; the cool-down state will not survive a restart", "err", err)
	} else if err != nil {
		log.Warn("turbo state not restored", "err", err)
	}
	defer func() {
		if err := set.SaveTurboState(); err != nil {
			log.Warn("turbo state not saved", "err", err)
		}
	}()
	g, err := pipeline.BuildGraph(reg, ds)
	if err != nil {
		return fmt.Errorf("derivations: %w", err)
	}
	if bad := pipeline.CheckCatalogued(reg); len(bad) > 0 {
		return fmt.Errorf("channels without an entry in the channel catalogue, or with another unit: %s", strings.Join(bad, ", "))
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	p.BindEmitters()

	// Pushing the recorded lines to a time-series database.
	pusher, err := openPusher(cfg, log)
	if err != nil {
		return err
	}
	if pusher != nil {
		defer pusher.Close()
	}

	// MQTT: the embedded broker unless an external one is configured.
	mcfg := mqttpub.Config{
		Prefix: cfg.MQTT.Prefix, Vehicle: cfg.Vehicle, MaxRate: cfg.MQTT.MaxRateHz,
		SnapshotEvery: time.Duration(cfg.MQTT.SnapshotEvery), Version: version, Logger: log,
	}
	var brk *broker.Broker
	if cfg.MQTT.Broker == "embedded" {
		anon := cfg.MQTT.Anonymous == nil || *cfg.MQTT.Anonymous
		var users []broker.User
		for _, u := range cfg.MQTT.Users {
			pw, err := readSecret("mqtt user "+u.Name+": password_file", u.PasswordFile)
			if err != nil {
				return err
			}
			users = append(users, broker.User{Name: u.Name, Password: pw, Commands: u.Commands})
		}
		// The broker outlives the publisher's last "offline" message: it is
		// the last stage to stop.
		// The publisher's client ID is reserved for it: no other client can
		// knock it off the broker.
		mcfg.ClientID = "plenum-" + cfg.Vehicle
		brk, err = broker.Start(context.WithoutCancel(ctx), broker.Config{Addr: cfg.MQTT.Listen, Anonymous: anon, Users: users, Prefix: cfg.MQTT.Prefix,
			DaemonClientID: mcfg.ClientID, Logger: quiet(log)})
		if err != nil {
			return err
		}
		defer brk.Close()
		mcfg.Broker = "tcp://" + brk.Addr().String()
		mcfg.Username, mcfg.Password = brk.Credentials()
	} else {
		mcfg.Broker = cfg.MQTT.Broker
		mcfg.Username = cfg.MQTT.Username
		if mcfg.Password, err = readSecret("mqtt password_file", cfg.MQTT.PasswordFile); err != nil {
			return err
		}
		if mcfg.TLS, err = tlsConfig(cfg.MQTT); err != nil {
			return err
		}
	}
	mux := http.NewServeMux()
	var rr *runs.Controller
	ccfg := console.Config{Vehicle: cfg.Vehicle, Logger: log}
	if cfg.Record.Dir != "" {
		if fixed, err := record.Recover(cfg.Record.Dir); err != nil {
			log.Warn("recovering earlier runs", "err", err)
		} else {
			for _, f := range fixed {
				log.Warn("a run was cut short; its torn tail was cut and it is marked ended_abnormally", "run", f.Run, "cut_bytes", f.CutBytes)
			}
		}
		// The recorder must see every sample: a ring of several seconds.
		deps := runs.Deps{Registry: reg, Sub: p.Subscribe("recorder", 1<<18), Store: p.Store(), Emit: p.Emit, Log: log}
		if pusher != nil {
			deps.Forward = pusher
		}
		rc, err := runsConfig(cfg)
		if err != nil {
			return err
		}
		rr = runs.New(rc, deps)
		mux.Handle("/api/runs/", rr.Handler())
		ccfg.CurrentRun, ccfg.Controls = rr.Current, rc.ControlToken != ""
	}
	if cfg.StateDir != "" {
		ob, err := mqttpub.OpenOutbox(filepath.Join(cfg.StateDir, "outbox-"+cfg.Vehicle), 10000)
		if err != nil {
			log.Warn("mqtt outbox unavailable; events are published without it", "err", err)
		} else {
			defer ob.Close()
			mcfg.Outbox = ob
		}
	}
	if cfg.MQTT.Commands && rr != nil {
		mcfg.OnCommand = rr.Command
	}
	pub, err := mqttpub.New(mcfg, reg, p.Subscribe("mqtt", 1<<14))
	if err != nil {
		return err
	}
	pub.SetStore(p.Store())

	// The live console: its stream subscribes to the pipeline.
	con := console.New(ccfg, p)
	mux.Handle("/console/", con.Handler())

	// Metrics: every source and publisher reports its health at scrape time.
	parts := []promexport.Reporter{pub, con}
	if rr != nil {
		parts = append(parts, rr)
	}
	if pusher != nil {
		parts = append(parts, pusher)
	}
	if brk != nil {
		parts = append(parts, brk)
	}
	for _, s := range srcs {
		if s.health != nil {
			parts = append(parts, s.health)
		}
	}
	col, err := promexport.New(p, time.Now, parts...)
	if err != nil {
		return err
	}
	evm := promexport.NewEvents(p.SubscribeEvents("event_metrics"))
	h, err := promexport.Handler(col, evm)
	if err != nil {
		return err
	}
	mux.Handle("/metrics", h)
	if ve := set.VETableHandler(); ve != nil {
		mux.Handle("/ve-table.csv", ve)
	}
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path != "/" {
			http.NotFound(w, r)
			return
		}
		fmt.Fprintf(w, "plenum %s for %s\n/console/  live console (driver, cell, wall)\n/metrics  Prometheus exposition\n\n%s\n", version, cfg.Vehicle, Safety)
	})
	ln, err := net.Listen("tcp", cfg.HTTP.Listen)
	if err != nil {
		return fmt.Errorf("http listen %s: %w", cfg.HTTP.Listen, err)
	}
	srv := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	if rr != nil {
		rr.SetPublish(pub.PublishSummary)
		id, err := rr.StartUnlessManual()
		if err != nil {
			ln.Close()
			return err
		}
		if id != "" {
			fmt.Fprintf(stdout, "recording: %s\n", filepath.Join(cfg.Record.Dir, id))
		}
	}

	fmt.Fprintf(stdout, "console:  http://%s/console/\n", ln.Addr())
	fmt.Fprintf(stdout, "metrics:  http://%s/metrics\n", ln.Addr())
	if brk != nil {
		fmt.Fprintf(stdout, "mqtt:     mqtt://%s  (subscribe to %s/%s/#, read-only)\n", brk.Addr(), cfg.MQTT.Prefix, cfg.Vehicle)
	} else {
		fmt.Fprintf(stdout, "mqtt:     publishing to %s under %s/%s/\n", cfg.MQTT.Broker, cfg.MQTT.Prefix, cfg.Vehicle)
	}

	// Start in stages, from the last consumer to the sources; stop in
	// reverse. The recorder stops before the pusher (its last lines go into
	// the backlog) and the publisher after both (it publishes the summary).
	st := []stage{
		{{"http", func(ctx context.Context) error { return serveHTTP(ctx, srv, ln) }}},
		{{"mqtt", func(ctx context.Context) error {
			if err := pub.Run(ctx); err != nil {
				// Recording and metrics go on without MQTT.
				log.Error("mqtt publisher stopped; live values and events are not published until a restart", "err", err)
				<-ctx.Done()
			}
			return nil
		}}, {"event metrics", evm.Run}, {"console", con.Run}},
	}
	if pusher != nil {
		st = append(st, stage{{"push", pusher.Run}})
	}
	if rr != nil {
		st = append(st, stage{{"recorder", rr.Run}})
	}
	st = append(st, stage{{"pipeline", p.Run}})
	var drivers stage
	for _, s := range srcs {
		drivers = append(drivers, part{s.name, func(ctx context.Context) error { return s.run(ctx, p) }})
	}
	return runStages(ctx, log, append(st, drivers)...)
}

// serveHTTP serves on ln until ctx ends, then shuts the server down,
// giving requests in flight a second.
func serveHTTP(ctx context.Context, srv *http.Server, ln net.Listener) error {
	errc := make(chan error, 1)
	go func() { errc <- srv.Serve(ln) }()
	select {
	case err := <-errc:
		return fmt.Errorf("http: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), time.Second)
	defer cancel()
	srv.Shutdown(sctx)
	return nil
}

// readSecret reads a password or token file (surrounding white space
// trimmed); an empty path gives an empty secret. Secrets are never kept in
// the configuration itself.
func readSecret(field, path string) (string, error) {
	if path == "" {
		return "", nil
	}
	b, err := os.ReadFile(path)
	if err != nil {
		return "", fmt.Errorf("%s: %w", field, err)
	}
	return strings.TrimSpace(string(b)), nil
}

// openPusher opens the push backlog when record.push is configured.
func openPusher(cfg *config.Config, log *slog.Logger) (*tsdbpush.Pusher, error) {
	pu := cfg.Record.Push
	if pu.URL == "" || cfg.Record.Dir == "" {
		return nil, nil
	}
	pc := tsdbpush.Config{URL: pu.URL, Username: pu.Username, Dir: pu.Dir, MaxBacklogBytes: int64(pu.MaxBacklogMB) << 20,
		FlushEvery: time.Duration(pu.FlushEvery), Gzip: pu.Gzip, Logger: log.With("component", "push")}
	if pc.Dir == "" {
		pc.Dir = filepath.Join(cfg.StateDir, "push-"+cfg.Vehicle)
	}
	var err error
	if pc.Token, err = readSecret("record.push.token_file", pu.TokenFile); err != nil {
		return nil, err
	}
	if pc.Password, err = readSecret("record.push.password_file", pu.PasswordFile); err != nil {
		return nil, err
	}
	p, err := tsdbpush.Open(pc)
	if err != nil {
		return nil, fmt.Errorf("record.push: %w", err)
	}
	return p, nil
}

// quiet turns the broker's info chatter down to warnings.
func quiet(log *slog.Logger) *slog.Logger {
	return slog.New(levelFilter{log.Handler(), slog.LevelWarn})
}

type levelFilter struct {
	slog.Handler
	min slog.Level
}

func (f levelFilter) Enabled(ctx context.Context, l slog.Level) bool {
	return l >= f.min && f.Handler.Enabled(ctx, l)
}

// WithAttrs keeps the filter around the handler with the attributes.
func (f levelFilter) WithAttrs(as []slog.Attr) slog.Handler {
	return levelFilter{f.Handler.WithAttrs(as), f.min}
}

// WithGroup keeps the filter around the handler with the group.
func (f levelFilter) WithGroup(name string) slog.Handler {
	return levelFilter{f.Handler.WithGroup(name), f.min}
}

func tlsConfig(m config.MQTT) (*tls.Config, error) {
	if m.CAFile == "" && m.CertFile == "" {
		return nil, nil
	}
	tc := &tls.Config{MinVersion: tls.VersionTLS12}
	if m.CAFile != "" {
		pem, err := os.ReadFile(m.CAFile)
		if err != nil {
			return nil, fmt.Errorf("mqtt ca_file: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("mqtt ca_file %s: no certificates found", m.CAFile)
		}
		tc.RootCAs = pool
	}
	if m.CertFile != "" {
		cert, err := tls.LoadX509KeyPair(m.CertFile, m.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("mqtt client certificate: %w", err)
		}
		tc.Certificates = []tls.Certificate{cert}
	}
	return tc, nil
}
