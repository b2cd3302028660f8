// Package promexport exposes the pipeline to Prometheus with a custom
// collector over the latest-value snapshot.
//
// Every fresh channel becomes a gauge named plenum_<quantity>_<unit>, with the
// labels source and sensor (both bounded: they come from configuration, never
// from data). A channel whose value is older than its maximum age, or whose
// quality is not ok, is left out of the scrape instead of showing its last
// value forever. Alongside: plenum_source_up, plenum_source_<counter>_total
// per source, the pipeline's sample counters and each consumer's drops.
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

// Collector is a prometheus.Collector over a pipeline.
type Collector struct {
	p       *pipeline.Pipeline
	now     func() time.Time
	up      *prometheus.Desc
	samples *prometheus.Desc
	dropped *prometheus.Desc
	descs   map[string]*prometheus.Desc
	mu      sync.Mutex // guards counter: scrapes may run concurrently
	counter map[string]*prometheus.Desc
}

// New returns a collector over p; now is the clock used for freshness.
// It fails when two channels would share a metric name and label set.
func New(p *pipeline.Pipeline, now func() time.Time) (*Collector, error) {
	c := &Collector{
		p:       p,
		now:     now,
		up:      prometheus.NewDesc("plenum_source_up", "1 while the source is delivering, 0 otherwise.", []string{"source"}, nil),
		samples: prometheus.NewDesc("plenum_pipeline_samples_total", "Samples through the pipeline by stage.", []string{"stage"}, nil),
		dropped: prometheus.NewDesc("plenum_consumer_dropped_samples_total", "Samples a slow consumer did not take.", []string{"consumer"}, nil),
		descs:   map[string]*prometheus.Desc{},
		counter: map[string]*prometheus.Desc{},
	}
	seen := map[string]string{}
	for _, ch := range p.Registry().Channels() {
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
		d := c.descs[MetricName(ch)]
		if d == nil {
			continue // registered after the collector was built
		}
		out <- prometheus.MustNewConstMetric(d, prometheus.GaugeValue, v.Value, ch.Source, SensorLabel(ch))
	}
	for _, h := range c.p.Health().All() {
		up := 0.0
		if h.Up() {
			up = 1
		}
		out <- prometheus.MustNewConstMetric(c.up, prometheus.GaugeValue, up, h.Name())
		for _, nc := range h.Counters() {
			d := c.counterDesc(nc.Name)
			out <- prometheus.MustNewConstMetric(d, prometheus.CounterValue, float64(nc.Value), h.Name())
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

func (c *Collector) counterDesc(name string) *prometheus.Desc {
	c.mu.Lock()
	defer c.mu.Unlock()
	d, ok := c.counter[name]
	if !ok {
		d = prometheus.NewDesc("plenum_source_"+name+"_total", "Source counter: "+name+".", []string{"source"}, nil)
		c.counter[name] = d
	}
	return d
}
