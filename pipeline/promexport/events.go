package promexport

import (
	"context"
	"strings"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/plenum-engine/plenum/pipeline"
)

// Rule is a warning rule as the metrics label it: its name and severity.
type Rule struct {
	Name, Severity string
}

// eventKinds are the kinds of event Events knows: their series exist, at
// zero, from the start, so that increase() sees the first event.
var eventKinds = []string{"turbo_lag", "turbo_lag_discarded", "run_started", "run_ended"}

// warningKinds are the kinds of warning event, counted by rule.
var warningKinds = []string{"warning_raised", "warning_cleared", "warning_acknowledged"}

// lagFigures are the figures of plenum_turbo_lag_seconds.
var lagFigures = []string{"t10", "t50", "t90", "settling"}

// Events turns pipeline events into Prometheus metrics: histograms of the
// turbo-lag figures (plenum_turbo_lag_seconds{figure="t10|t50|t90|settling"}),
// plenum_turbo_lag_overshoot_ratio, and a counter of events by kind and, for
// warnings, rule: plenum_events_total{kind="warning_raised",rule="over_boost"}
// (rule is "" for the other kinds). The series of every known kind, every
// rule given and every lag figure are there at zero from the start.
type Events struct {
	sub       *pipeline.Subscription
	lag       *prometheus.HistogramVec
	overshoot prometheus.Histogram
	count     *prometheus.CounterVec
}

// NewEvents returns the event metrics fed from sub, with the series of the
// known kinds and of the warning kinds of each rule at zero.
func NewEvents(sub *pipeline.Subscription, rules ...Rule) *Events {
	e := &Events{
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
			Help: "Events by kind, and for warnings by rule: warnings raised, cleared and acknowledged, turbo-lag measurements, discarded measurements, runs started and ended.",
		}, []string{"kind", "rule"}),
	}
	for _, k := range eventKinds {
		e.count.WithLabelValues(k, "")
	}
	for _, r := range rules {
		for _, k := range warningKinds {
			e.count.WithLabelValues(k, r.Name)
		}
	}
	for _, f := range lagFigures {
		e.lag.WithLabelValues(f)
	}
	return e
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
	rule := ""
	if strings.HasPrefix(ev.Kind, "warning_") {
		rule = ev.Name // bounded: the configured rules and recorder_behind
	}
	e.count.WithLabelValues(ev.Kind, rule).Inc()
	if ev.Kind != "turbo_lag" {
		return
	}
	for _, f := range lagFigures {
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
