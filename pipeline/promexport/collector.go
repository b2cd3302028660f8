// Package promexport exposes the pipeline to Prometheus with a custom
// collector over the latest-value snapshot.
//
// Every fresh channel becomes a gauge named plenum_<quantity>_<unit>, with the
// labels source and sensor (both bounded: they come from configuration, never
// from data). The warning_<rule> channels are the exception:
// plenum_warning_active{rule="over_boost",severity="critical"}, 1 while the
// rule is raised. A channel whose value is older than its maximum age, or whose
// quality is not ok, is left out of the scrape instead of showing its last
// value forever. Alongside: every part's health as it reports it at scrape
// time (plenum_<kind>_up, plenum_<kind>_<counter>_total and
// plenum_<kind>_<gauge>, labelled <kind>="<name>": plenum_source_up{source="mcu"}),
// the pipeline's sample counters and each consumer's drops.
package promexport

import (
	"fmt"
	"net/http"
	"regexp"
	"strings"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/plenum-engine/plenum/pipeline"
)

// MetricName returns the Prometheus metric name of a channel: plenum_,
// the quantity, and the unit unless the quantity already ends in it
// (plenum_air_fuel_ratio, not plenum_air_fuel_ratio_ratio).
func MetricName(c pipeline.Channel) string {
	name := "plenum_" + c.Quantity
	if c.Unit != pipeline.None && !strings.HasSuffix(name, "_"+string(c.Unit)) {
		name += "_" + string(c.Unit)
	}
	return name
}

// SensorLabel returns the sensor label of a channel: its Sensor, or its name.
func SensorLabel(c pipeline.Channel) string {
	if c.Sensor != "" {
		return c.Sensor
	}
	return c.Name
}

var metricRE = regexp.MustCompile(`^[a-zA-Z_:][a-zA-Z0-9_:]*$`)

// Reporter is a part (a source or a publisher) that reports its health when
// metrics are scraped.
type Reporter interface {
	Report() pipeline.HealthReport
}

// Collector is a prometheus.Collector over a pipeline and the parts around it.
type Collector struct {
	p       *pipeline.Pipeline
	now     func() time.Time
	parts   []Reporter
	samples *prometheus.Desc
	dropped *prometheus.Desc
	descs   map[string]*prometheus.Desc
	mu      sync.Mutex // guards health: scrapes may run concurrently
	health  map[string]*prometheus.Desc
	warning *prometheus.Desc
	sev     map[string]string // rule name -> severity
}

// warningPrefix names the channels of the warning family.
const warningPrefix = "warning_"

// isWarning reports whether ch is a warning rule's channel.
func isWarning(ch pipeline.Channel) bool {
	return strings.HasPrefix(ch.Name, warningPrefix) && ch.Quantity == "warning_active"
}

// WithRules gives the collector the severity of each warning rule, for the
// severity label of plenum_warning_active (empty for a rule not given).
// Call it before the collector is served.
func (c *Collector) WithRules(rules ...Rule) *Collector {
	for _, r := range rules {
		c.sev[r.Name] = r.Severity
	}
	return c
}

// New returns a collector over p and the health of parts; now is the clock
// used for freshness. It fails when two channels would share a metric name
// and label set.
func New(p *pipeline.Pipeline, now func() time.Time, parts ...Reporter) (*Collector, error) {
	c := &Collector{
		p:       p,
		now:     now,
		parts:   parts,
		samples: prometheus.NewDesc("plenum_pipeline_samples_total", "Samples through the pipeline by stage.", []string{"stage"}, nil),
		dropped: prometheus.NewDesc("plenum_consumer_dropped_samples_total", "Samples a slow consumer did not take.", []string{"consumer"}, nil),
		descs:   map[string]*prometheus.Desc{},
		health:  map[string]*prometheus.Desc{},
		warning: prometheus.NewDesc("plenum_warning_active", "1 while the warning rule is raised, 0 otherwise.", []string{"rule", "severity"}, nil),
		sev:     map[string]string{},
	}
	seen := map[string]string{}
	for _, ch := range p.Registry().Channels() {
		if isWarning(ch) {
			continue
		}
		name := MetricName(ch)
		if !metricRE.MatchString(name) {
			return nil, fmt.Errorf("channel %q: metric name %q is not valid", ch.Name, name)
		}
		key := name + "|" + ch.Source + "|" + SensorLabel(ch)
		if other, dup := seen[key]; dup {
			return nil, fmt.Errorf("channels %q and %q both export %s{source=%q,sensor=%q}", other, ch.Name, name, ch.Source, SensorLabel(ch))
		}
		seen[key] = ch.Name
		if _, ok := c.descs[name]; !ok {
			unit := string(ch.Unit)
			if unit == "" {
				unit = "no unit"
			}
			c.descs[name] = prometheus.NewDesc(name,
				fmt.Sprintf("Latest fresh value of each %s channel, in %s.", ch.Quantity, unit),
				[]string{"source", "sensor"}, nil)
		}
	}
	return c, nil
}

// Describe sends nothing: the set of channels that are fresh changes from
// scrape to scrape, so this is an unchecked collector.
func (c *Collector) Describe(chan<- *prometheus.Desc) {}

// Collect sends the fresh channels and the health metrics.
func (c *Collector) Collect(out chan<- prometheus.Metric) {
	now := c.now()
	chans := c.p.Registry().Channels()
	for i, v := range c.p.Store().Snapshot(nil) {
		if i >= len(chans) {
			break
		}
		ch := chans[i]
		if !v.Fresh(now, ch.Age()) {
			continue
		}
		if isWarning(ch) {
			rule := strings.TrimPrefix(ch.Name, warningPrefix)
			out <- prometheus.MustNewConstMetric(c.warning, prometheus.GaugeValue, v.Value, rule, c.sev[rule])
			continue
		}
		d := c.descs[MetricName(ch)]
		if d == nil {
			continue // registered after the collector was built
		}
		out <- prometheus.MustNewConstMetric(d, prometheus.GaugeValue, v.Value, ch.Source, SensorLabel(ch))
	}
	for _, part := range c.parts {
		r := part.Report()
		up := 0.0
		if r.Up {
			up = 1
		}
		out <- prometheus.MustNewConstMetric(c.healthDesc(r.Kind, "up", "1 while the "+r.Kind+" is up (delivering or connected), 0 otherwise."), prometheus.GaugeValue, up, r.Name)
		for _, nc := range r.Counters {
			d := c.healthDesc(r.Kind, nc.Name+"_total", r.Kind+" counter: "+nc.Name+".")
			out <- prometheus.MustNewConstMetric(d, prometheus.CounterValue, float64(nc.Value), r.Name)
		}
		for _, g := range r.Gauges {
			d := c.healthDesc(r.Kind, g.Name, r.Kind+" level: "+g.Name+".")
			out <- prometheus.MustNewConstMetric(d, prometheus.GaugeValue, g.Value, r.Name)
		}
	}
	pc := c.p.Counters()
	for _, st := range []struct {
		n string
		v uint64
	}{{"accepted", pc.Accepted}, {"flagged", pc.Flagged}, {"derived", pc.Derived}, {"rejected", pc.Rejected}} {
		out <- prometheus.MustNewConstMetric(c.samples, prometheus.CounterValue, float64(st.v), st.n)
	}
	for _, s := range c.p.Subscriptions() {
		out <- prometheus.MustNewConstMetric(c.dropped, prometheus.CounterValue, float64(s.Dropped()), s.Name())
	}
}

// Handler returns an http.Handler serving the collector, the Go and process
// collectors and any extra collectors on a registry of its own.
func Handler(c *Collector, extra ...prometheus.Collector) (http.Handler, error) {
	reg := prometheus.NewRegistry()
	cols := append([]prometheus.Collector{c, collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{})}, extra...)
	for _, col := range cols {
		if err := reg.Register(col); err != nil {
			return nil, fmt.Errorf("prometheus: register: %w", err)
		}
	}
	return promhttp.HandlerFor(reg, promhttp.HandlerOpts{ErrorHandling: promhttp.ContinueOnError}), nil
}

// healthDesc returns the description of plenum_<kind>_<suffix>{<kind>}.
func (c *Collector) healthDesc(kind, suffix, help string) *prometheus.Desc {
	name := "plenum_" + kind + "_" + suffix
	c.mu.Lock()
	defer c.mu.Unlock()
	d, ok := c.health[name]
	if !ok {
		d = prometheus.NewDesc(name, help, []string{kind}, nil)
		c.health[name] = d
	}
	return d
}
