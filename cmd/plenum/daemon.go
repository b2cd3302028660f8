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
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/broker"
	"github.com/plenum-engine/plenum/pipeline/derived"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
	"github.com/plenum-engine/plenum/pipeline/promexport"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/tsdbpush"
)

// source is anything that feeds the pipeline until its context ends.
type source interface {
	Name() string
	Run(ctx context.Context) error
}

// runDaemon assembles sources, derivations, the pipeline and the publishers
// from cfg and runs them until ctx is done.
func runDaemon(ctx context.Context, cfg *config.Config, stdout io.Writer, log *slog.Logger) error {
	fmt.Fprintln(stdout, Safety)
	reg := pipeline.NewRegistry()
	// The pipeline is created after all channels are known, but the sources
	// need somewhere to put samples: they get a forwarding sink.
	sink := &lateSink{}
	health := pipeline.NewHealthSet()
	srcs, cleanup, err := buildSources(ctx, cfg, reg, sink, health, log)
	if err != nil {
		return err
	}
	defer cleanup()
	ds, set, err := buildAll(cfg, reg)
	if err != nil {
		return err
	}
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
	p := pipeline.New(reg, g, pipeline.Options{})
	p.AdoptHealth(health)
	p.BindEmitters()
	sink.set(p)

	// Pushing the recorded lines to a time-series database.
	pusher, err := openPusher(cfg, log)
	if err != nil {
		return err
	}
	var extra []prometheus.Collector
	if pusher != nil {
		defer pusher.Close()
		extra = pushMetrics(pusher)
	}

	// Metrics.
	col, err := promexport.New(p, time.Now)
	if err != nil {
		return err
	}
	evm := promexport.NewEvents(p.SubscribeEvents("event_metrics"))
	h, err := promexport.Handler(col, append([]prometheus.Collector{evm}, extra...)...)
	if err != nil {
		return err
	}
	mux := http.NewServeMux()
	mux.Handle("/metrics", h)
	if ve := set.VETableHandler(); ve != nil {
		mux.Handle("/ve-table.csv", ve)
	}
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path != "/" {
			http.NotFound(w, r)
			return
		}
		fmt.Fprintf(w, "plenum %s for %s\n/metrics  Prometheus exposition\n\n%s\n", version, cfg.Vehicle, Safety)
	})
	ln, err := net.Listen("tcp", cfg.HTTP.Listen)
	if err != nil {
		return fmt.Errorf("http listen %s: %w", cfg.HTTP.Listen, err)
	}
	srv := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}

	// MQTT: the embedded broker unless an external one is configured.
	mcfg := mqttpub.Config{
		Prefix: cfg.MQTT.Prefix, Vehicle: cfg.Vehicle, MaxRate: cfg.MQTT.MaxRateHz,
		SnapshotEvery: time.Duration(cfg.MQTT.SnapshotEvery), Version: version, Logger: log,
	}
	var brk *broker.Broker
	if cfg.MQTT.Broker == "embedded" {
		anon := cfg.MQTT.Anonymous == nil || *cfg.MQTT.Anonymous
		// The broker outlives the publisher's last "offline" message: it is
		// closed at the end of the shutdown, not by ctx.
		var users []broker.User
		for _, u := range cfg.MQTT.Users {
			pw, err := readSecret("mqtt user "+u.Name+": password_file", u.PasswordFile)
			if err != nil {
				ln.Close()
				return err
			}
			users = append(users, broker.User{Name: u.Name, Password: pw, Commands: u.Commands})
		}
		brk, err = broker.Start(context.Background(), broker.Config{Addr: cfg.MQTT.Listen, Anonymous: anon, Users: users, Prefix: cfg.MQTT.Prefix, Logger: quiet(log)})
		if err != nil {
			ln.Close()
			return err
		}
		mcfg.Broker = "tcp://" + brk.Addr().String()
		mcfg.Username, mcfg.Password = brk.Credentials()
	} else {
		mcfg.Broker = cfg.MQTT.Broker
		mcfg.Username = cfg.MQTT.Username
		if mcfg.Password, err = readSecret("mqtt password_file", cfg.MQTT.PasswordFile); err != nil {
			ln.Close()
			return err
		}
		if mcfg.TLS, err = tlsConfig(cfg.MQTT); err != nil {
			ln.Close()
			return err
		}
	}
	var rr *runs
	if cfg.Record.Dir != "" {
		if fixed, err := record.Recover(cfg.Record.Dir); err != nil {
			log.Warn("recovering earlier runs", "err", err)
		} else {
			for _, f := range fixed {
				log.Warn("a run was cut short; its torn tail was cut and it is marked ended_abnormally", "run", f.Run, "cut_bytes", f.CutBytes)
			}
		}
		// The recorder must see every sample: a ring of several seconds.
		rr = &runs{cfg: cfg, reg: reg, sub: p.Subscribe("recorder", 1<<18), log: log, emit: p.Emit, store: p.Store()}
		if pusher != nil {
			rr.forward = pusher
		}
		mux.Handle("/api/runs/", rr.handler())
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
		mcfg.OnCommand = rr.command
	}
	pub, err := mqttpub.New(mcfg, reg, p.Subscribe("mqtt", 1<<14))
	if err != nil {
		ln.Close()
		return err
	}
	pub.SetStore(p.Store())
	if rr != nil {
		rr.publish = pub.PublishSummary
		if !cfg.Record.Manual {
			id, err := rr.start(startRequest{})
			if err != nil {
				ln.Close()
				return err
			}
			fmt.Fprintf(stdout, "recording: %s\n", filepath.Join(cfg.Record.Dir, id))
		}
	}

	fmt.Fprintf(stdout, "metrics:  http://%s/metrics\n", ln.Addr())
	if brk != nil {
		fmt.Fprintf(stdout, "mqtt:     mqtt://%s  (subscribe to %s/%s/#, read-only)\n", brk.Addr(), cfg.MQTT.Prefix, cfg.Vehicle)
	} else {
		fmt.Fprintf(stdout, "mqtt:     publishing to %s under %s/%s/\n", cfg.MQTT.Broker, cfg.MQTT.Prefix, cfg.Vehicle)
	}

	runCtx, cancel := context.WithCancel(ctx)
	defer cancel()
	var wg sync.WaitGroup
	errs := make(chan error, len(srcs)+4)
	start := func(name string, f func(context.Context) error, c context.Context) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			if err := f(c); err != nil && c.Err() == nil {
				log.Error("component stopped", "component", name, "err", err)
				errs <- fmt.Errorf("%s: %w", name, err)
			}
		}()
	}
	// The pipeline and the publisher stop after the sources, so that what the
	// sources took last is still processed and published.
	pipeCtx, pipeCancel := context.WithCancel(context.Background())
	defer pipeCancel()
	pipeDone := make(chan struct{})
	go func() { p.Run(pipeCtx); close(pipeDone) }()
	pubCtx, pubCancel := context.WithCancel(context.Background())
	defer pubCancel()
	pubDone := make(chan struct{})
	go func() { pub.Run(pubCtx); close(pubDone) }()
	go func() {
		if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			errs <- fmt.Errorf("http: %w", err)
		}
	}()
	for _, s := range srcs {
		start(s.Name(), s.Run, runCtx)
	}
	recCtx, recCancel := context.WithCancel(context.Background())
	defer recCancel()
	recDone := make(chan struct{})
	if rr != nil {
		go func() { defer close(recDone); rr.Run(recCtx) }()
	} else {
		close(recDone)
	}
	pushCtx, pushCancel := context.WithCancel(context.Background())
	defer pushCancel()
	pushDone := make(chan struct{})
	if pusher != nil {
		go func() {
			defer close(pushDone)
			if err := pusher.Run(pushCtx); err != nil {
				log.Error("push: the backlog could not be written at the end; unsent lines may be lost", "err", err)
			}
		}()
	} else {
		close(pushDone)
	}
	evCtx, evCancel := context.WithCancel(context.Background())
	defer evCancel()
	go evm.Run(evCtx)

	var runErr error
	select {
	case <-ctx.Done():
	case runErr = <-errs:
	}
	log.Info("shutting down")
	cancel()
	waitTimeout(&wg, shutdownGrace)
	pipeCancel()
	<-pipeDone
	recCancel()
	<-recDone
	pushCancel() // after the recorder: its last lines are in the backlog
	<-pushDone
	if rr != nil {
		time.Sleep(300 * time.Millisecond) // let the outbox hand the summary to a connected broker
	}
	pubCancel()
	select {
	case <-pubDone:
	case <-time.After(shutdownGrace):
	}
	sctx, scancel := context.WithTimeout(context.Background(), time.Second)
	srv.Shutdown(sctx)
	scancel()
	if brk != nil {
		brk.Close()
	}
	return runErr
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

// pushMetrics exposes the pusher's counters.
func pushMetrics(p *tsdbpush.Pusher) []prometheus.Collector {
	counter := func(name, help string, f func(tsdbpush.Stats) uint64) prometheus.Collector {
		return prometheus.NewCounterFunc(prometheus.CounterOpts{Name: name, Help: help}, func() float64 { return float64(f(p.Stats())) })
	}
	return []prometheus.Collector{
		counter("plenum_push_sent_lines_total", "Recorded lines the time-series database accepted.", func(s tsdbpush.Stats) uint64 { return s.SentLines }),
		counter("plenum_push_retries_total", "Write requests retried after a failure.", func(s tsdbpush.Stats) uint64 { return s.Retries }),
		counter("plenum_push_rejected_lines_total", "Lines the database refused as malformed, kept under rejected/.", func(s tsdbpush.Stats) uint64 { return s.RejectedLines }),
		counter("plenum_push_dropped_lines_total", "Lines dropped unsent because the backlog was full.", func(s tsdbpush.Stats) uint64 { return s.DroppedLines }),
		prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "plenum_push_backlog_bytes", Help: "Bytes recorded but not yet accepted by the database."},
			func() float64 { return float64(p.Stats().BacklogBytes) }),
	}
}

func waitTimeout(wg *sync.WaitGroup, d time.Duration) {
	done := make(chan struct{})
	go func() { wg.Wait(); close(done) }()
	select {
	case <-done:
	case <-time.After(d):
	}
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

// lateSink forwards samples to the pipeline once it exists.
type lateSink struct {
	mu sync.RWMutex
	p  *pipeline.Pipeline
}

func (s *lateSink) set(p *pipeline.Pipeline) {
	s.mu.Lock()
	s.p = p
	s.mu.Unlock()
}

// Put forwards a sample; before the pipeline exists it is dropped.
func (s *lateSink) Put(x pipeline.Sample) bool {
	s.mu.RLock()
	p := s.p
	s.mu.RUnlock()
	if p == nil {
		return false
	}
	return p.Put(x)
}
