package sdnotify

import (
	"context"
	"log/slog"
	"sync"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline"
)

// Watchdog pings the service manager's watchdog while the work it guards
// makes progress. Every half interval it asks Probe, bounded by the other
// half; only an answered probe is followed by a ping. A probe that is not
// answered in time is logged (once per stall) and counted, and no ping is
// sent, so that the service manager restarts the daemon once its interval
// has passed without one. If the work answers again before that, pings
// resume: the daemon recovered, and the service manager judges by its own
// deadline.
type Watchdog struct {
	// Notifier sends the pings.
	Notifier *Notifier
	// Interval is the service manager's watchdog timeout (Config.WatchdogInterval);
	// 0: Run returns at once.
	Interval time.Duration
	// Probe returns nil once the guarded loop has shown it is making
	// progress, or the context's error when it ends first. For the daemon
	// it is pipeline.Pipeline.Probe: an answer from the ingest loop itself.
	Probe func(context.Context) error
	// What names the guarded work in the log ("ingest loop").
	What string
	// Clock ticks the pings (default clock.System).
	Clock clock.Clock
	// Log receives the stall and recovery lines (default: discarded).
	Log *slog.Logger

	once   sync.Once // makes health: Report may come first, from a scrape
	health *pipeline.Health
}

// Report gives the watchdog's counters: pings sent, probes unanswered in
// time, stalls (each run of unanswered probes counts once), pings that
// could not be sent; up while the guarded work answers.
func (w *Watchdog) Report() pipeline.HealthReport { return w.h().Report() }

func (w *Watchdog) h() *pipeline.Health {
	w.once.Do(func() { w.health = pipeline.NewHealth("watchdog", "service") })
	return w.health
}

// Run pings until ctx ends. It returns nil: a failing ping is counted and
// logged, never fatal.
func (w *Watchdog) Run(ctx context.Context) error {
	h := w.h()
	if w.Interval <= 0 || w.Probe == nil {
		return nil
	}
	clk := clock.Or(w.Clock)
	log := w.Log
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	what := w.What
	if what == "" {
		what = "guarded loop"
	}
	pings, missed, stalls, failed := h.Counter("pings"), h.Counter("probes_unanswered"), h.Counter("stalls"), h.Counter("pings_failed")
	half := w.Interval / 2
	stalled, pingErr := false, false
	// One timer at a time: each tick starts a probe, and the next tick
	// (half an interval on) is its bound. A probe unanswered by then is a
	// miss, and the next probe starts at once.
	tick := clk.After(half)
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-tick:
		}
		tick = clk.After(half)
		pctx, cancel := context.WithCancel(ctx)
		answered := make(chan error, 1)
		go func() { answered <- w.Probe(pctx) }()
		var err error
		select {
		case err = <-answered:
		case now := <-tick:
			cancel()
			<-answered
			err = context.DeadlineExceeded
			fired := make(chan time.Time, 1)
			fired <- now
			tick = fired
		case <-ctx.Done():
			cancel()
			<-answered
			return nil
		}
		cancel()
		if err != nil {
			missed.Add(1)
			h.SetUp(false)
			if !stalled {
				stalled = true
				stalls.Add(1)
				log.Error("the "+what+" did not answer the watchdog's probe in time; watchdog pings stop, so the service manager restarts the daemon unless it recovers",
					"bound", half, "err", err)
			}
			continue
		}
		h.SetUp(true)
		if stalled {
			stalled = false
			log.Warn("the " + what + " answers again; watchdog pings resume")
		}
		if err := w.Notifier.Ping(); err != nil {
			failed.Add(1)
			if !pingErr {
				log.Warn("watchdog ping not sent", "err", err)
			}
			pingErr = true
			continue
		}
		pingErr = false
		pings.Add(1)
	}
}
