package promexport

import (
	"context"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/plenum-engine/plenum/pipeline"
)

// Events turns pipeline events into Prometheus metrics: histograms of the
// turbo-lag figures (plenum_turbo_lag_seconds{figure="t10|t50|t90|settling"}),
// plenum_turbo_lag_overshoot_ratio, and a counter of events by kind.
type Events struct {
	sub       *pipeline.Subscription
	lag       *prometheus.HistogramVec
	overshoot prometheus.Histogram
	count     *prometheus.CounterVec
}

// NewEvents returns the event metrics fed from sub.
func NewEvents(sub *pipeline.Subscription) *Events {
	return &Events{
		sub: sub,
		lag: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name:    "plenum_turbo_lag_seconds",
			Help:    "Time from throttle tip-in to 10, 50 and 90 percent of the boost rise, and to settling within 2 percent.",
			Buckets: []float64{0.1, 0.2, 0.3, 0.5, 0.75, 1, 1.5, 2, 3, 5, 8},
		}, []string{"figure"}),
		overshoot: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name:    "plenum_turbo_lag_overshoot_ratio",
			Help:    "Boost overshoot after a tip-in, as a ratio of the step.",
			Buckets: []float64{0, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5},
		}),
		count: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "plenum_events_total",
			Help: "Events by kind: warnings raised and cleared, turbo-lag measurements, discarded measurements.",
		}, []string{"kind"}),
	}
}

// Describe describes the event metrics.
func (e *Events) Describe(ch chan<- *prometheus.Desc) {
	e.lag.Describe(ch)
	e.overshoot.Describe(ch)
	e.count.Describe(ch)
}

// Collect collects the event metrics.
func (e *Events) Collect(ch chan<- prometheus.Metric) {
	e.lag.Collect(ch)
	e.overshoot.Collect(ch)
	e.count.Collect(ch)
}

// Observe records one event.
func (e *Events) Observe(ev pipeline.Event) {
	e.count.WithLabelValues(ev.Kind).Inc()
	if ev.Kind != "turbo_lag" {
		return
	}
	for _, f := range []string{"t10", "t50", "t90", "settling"} {
		if v, ok := ev.Fields[f+"_seconds"]; ok && v == v {
			e.lag.WithLabelValues(f).Observe(v)
		}
	}
	if v, ok := ev.Fields["overshoot_ratio"]; ok && v == v {
		e.overshoot.Observe(v)
	}
}

// Run drains the subscription until ctx is done. Samples are discarded.
func (e *Events) Run(ctx context.Context) error {
	var buf []pipeline.Sample
	var evs []pipeline.Event
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-e.sub.C():
			buf, evs = e.sub.Drain(buf[:0], evs[:0])
			for _, ev := range evs {
				e.Observe(ev)
			}
		}
	}
}
