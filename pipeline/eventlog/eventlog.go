// Package eventlog writes to the log, at info level, the pipeline's events a
// person follows there: a warning raised, cleared or acknowledged. It reads
// the events from a subscription of its own, so that the ingest loop and the
// derivations never wait on the log.
package eventlog

import (
	"context"
	"log/slog"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// Config configures the event log.
type Config struct {
	// Logger receives the lines; nil discards them.
	Logger *slog.Logger
}

// Events is the consumer that logs events; build it with New.
type Events struct {
	sub  *pipeline.Subscription
	log  *slog.Logger
	lost uint64 // events the subscription dropped, already said
}

// New returns the event log reading sub, a subscription from
// Pipeline.SubscribeEvents.
func New(cfg Config, sub *pipeline.Subscription) *Events {
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	return &Events{sub: sub, log: log}
}

// Run logs the events as they arrive until ctx ends, then logs those still
// waiting. It returns nil.
func (e *Events) Run(ctx context.Context) error {
	var buf []pipeline.Sample
	var evs []pipeline.Event
	drain := func() {
		buf, evs = e.sub.Drain(buf[:0], evs[:0])
		for _, ev := range evs {
			e.Log(ev)
		}
		if n := e.sub.DroppedEvents(); n > e.lost {
			e.log.Warn("the event log fell behind: events were not logged (they were recorded and published)", "events", n-e.lost)
			e.lost = n
		}
	}
	for {
		select {
		case <-ctx.Done():
			drain()
			return nil
		case <-e.sub.C():
			drain()
		}
	}
}

// Log writes one event's line, if it is of a kind the log shows: a warning
// raised (rule, severity, since when its condition held), cleared (how long
// it lasted) or acknowledged. Runs starting and stopping are logged by
// the run controller; other events are left to the recording and metrics.
func (e *Events) Log(ev pipeline.Event) {
	switch ev.Kind {
	case "warning_raised":
		e.log.Info("warning raised", "rule", ev.Name, "severity", severity(ev), "condition_since", ev.Start.Format(time.RFC3339Nano))
	case "warning_cleared":
		e.log.Info("warning cleared", "rule", ev.Name, "severity", severity(ev), "lasted", ev.End.Sub(ev.Start).Round(time.Millisecond))
	case "warning_acknowledged":
		e.log.Info("warning acknowledged", "rule", ev.Name, "severity", severity(ev))
	}
}

// severity is the event's severity tag, or "warning" without one.
func severity(ev pipeline.Event) string {
	if s := ev.Tags["severity"]; s != "" {
		return s
	}
	return "warning"
}
