package sdnotify

import (
	"context"
	"errors"
	"log/slog"
	"os"
	"strings"
	"sync"

	"github.com/plenum-engine/plenum/pipeline"
)

// Service is a daemon's side of the service manager: READY=1 once every
// part wrapped by Started runs and Probe has answered, a reload on every
// request from Reloads (RELOADING=1, then READY=1 again), and STOPPING=1
// when Run's context ends. Reloads are counted, applied or refused, in the
// health report "reload"/"config", and logged. Build one with NewService;
// set the fields before Run starts.
type Service struct {
	// Notifier sends the state changes (NewService: from the Config).
	Notifier *Notifier
	// Watchdog pings while the guarded work makes progress (NewService:
	// Interval from the Config, 0 when none is asked for). The daemon sets
	// its Probe and What, and runs it.
	Watchdog *Watchdog
	// Probe, when set, must answer before READY=1 is sent (the daemon: an
	// answer from the ingest loop); an error (the context ended first)
	// means the daemon stopped before it was ready, and nothing is sent.
	Probe func(context.Context) error
	// Status is the status line sent with READY=1.
	Status string
	// Reloads are the reload requests (SIGHUP); nil: never.
	Reloads <-chan os.Signal
	// ConfigPath is the file a reload reads: in the RELOADING=1 status and
	// in every reload line of the log (config=…).
	ConfigPath string
	// Reload reads the configuration again and applies what it may. An
	// error refuses the reload (the daemon runs on with what it has); a
	// *Refusal gives the reason for the log line and its cause apart. Nil:
	// every request is refused.
	Reload func() (Reloaded, error)
	// Level, when set, is the log level a reload changes (Reloaded.Level).
	Level *slog.LevelVar
	// Log receives the reload lines and the notifications that failed
	// (default: discarded).
	Log *slog.Logger

	up     sync.WaitGroup // one per Started part, done once it runs
	once   sync.Once      // makes health: Report may come first, from a scrape
	health *pipeline.Health
}

// Reloaded is what an applied reload changed.
type Reloaded struct {
	// Changed names the keys applied live; empty: the configuration is
	// unchanged.
	Changed []string
	// Level is the log level the new configuration asks for; applied to
	// Service.Level when that is set.
	Level slog.Level
}

// Refusal is a refused reload: Why goes into the log line, Err (when set)
// into its err attribute.
type Refusal struct {
	Why string
	Err error
}

// Error says why, and the cause when there is one.
func (r *Refusal) Error() string {
	if r.Err == nil {
		return r.Why
	}
	return r.Why + ": " + r.Err.Error()
}

// Unwrap returns the cause.
func (r *Refusal) Unwrap() error { return r.Err }

// NewService returns a service notifying as c says, logging to log, with
// a Watchdog whose Interval is c's (0, and logged, when c's watchdog
// settings cannot be read).
func NewService(c Config, log *slog.Logger) *Service {
	s := &Service{Notifier: New(c), Log: log}
	iv, err := c.WatchdogInterval()
	if err != nil {
		s.log().Error("the service manager's watchdog settings cannot be read; no watchdog pings", "err", err)
	}
	s.Watchdog = &Watchdog{Notifier: s.Notifier, Interval: iv, Log: log}
	return s
}

// Report gives the reload counters (applied, refused); up while the file
// is what runs, i.e. until a reload is refused and again after one is
// applied.
func (s *Service) Report() pipeline.HealthReport { return s.h().Report() }

func (s *Service) h() *pipeline.Health {
	s.once.Do(func() {
		s.health = pipeline.NewHealth("reload", "config")
		s.health.SetUp(true)
	})
	return s.health
}

func (s *Service) log() *slog.Logger {
	if s.Log == nil {
		return slog.New(slog.DiscardHandler)
	}
	return s.Log
}

// Started wraps a part's Run so that READY=1 waits until it runs. Call it
// before Run starts.
func (s *Service) Started(run func(context.Context) error) func(context.Context) error {
	s.up.Add(1)
	return func(ctx context.Context) error {
		s.up.Done()
		return run(ctx)
	}
}

// Run sends READY=1 once every Started part runs and Probe has answered,
// reloads on every request until ctx ends, and then sends STOPPING=1. It
// returns nil: a notification that cannot be sent is logged, never fatal.
func (s *Service) Run(ctx context.Context) error {
	log := s.log()
	s.h()
	defer func() {
		if err := s.Notifier.Stopping("stopping: flushing and closing"); err != nil {
			log.Warn("the service manager was not told of the shutdown", "err", err)
		}
	}()
	up := make(chan struct{})
	go func() { s.up.Wait(); close(up) }()
	select {
	case <-up:
	case <-ctx.Done():
		return nil
	}
	if s.Probe != nil {
		if err := s.Probe(ctx); err != nil {
			return nil // stopped before the probed work ran
		}
	}
	if err := s.Notifier.Ready(s.Status); err != nil {
		log.Warn("the service manager was not told the daemon is ready", "err", err)
	}
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-s.Reloads:
			s.reload(log)
			if err := s.Notifier.Ready(s.Status); err != nil {
				log.Warn("the service manager was not told the reload is over", "err", err)
			}
		}
	}
}

// reload runs one reload: RELOADING=1, Reload, then the count and the log
// line for what came of it.
func (s *Service) reload(log *slog.Logger) {
	path := s.ConfigPath
	if err := s.Notifier.Reloading("reloading " + path); err != nil {
		log.Warn("the service manager was not told of the reload", "err", err)
	}
	h := s.h()
	var r Reloaded
	err := errors.New("this daemon cannot reload its configuration")
	if s.Reload != nil {
		r, err = s.Reload()
	}
	if err != nil {
		h.Counter("refused").Add(1)
		h.SetUp(false)
		why, args := err.Error(), []any{"config", path}
		if ref, ok := errors.AsType[*Refusal](err); ok {
			why = ref.Why
			if ref.Err != nil {
				args = append(args, "err", ref.Err)
			}
		}
		log.Error("reload refused: "+why+"; running on with the configuration loaded before", args...)
		return
	}
	h.Counter("applied").Add(1)
	h.SetUp(true)
	if len(r.Changed) == 0 {
		log.Info("reload: the configuration is unchanged", "config", path)
		return
	}
	if s.Level == nil {
		log.Info("reload applied", "config", path, "changed", strings.Join(r.Changed, ","))
		return
	}
	// The line saying so is written under the less strict of the two
	// levels, so that a person sees the change either way.
	if r.Level <= s.Level.Level() {
		s.Level.Set(r.Level)
	}
	log.Info("reload applied", "config", path, "changed", strings.Join(r.Changed, ","), "log_level", r.Level.String())
	s.Level.Set(r.Level)
}
