package promexport

import (
	"io"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/plenum-engine/plenum/pipeline"
)

// scrapeText serves the collectors once and returns the exposition.
func scrapeText(t *testing.T, cols ...prometheus.Collector) string {
	t.Helper()
	reg := prometheus.NewRegistry()
	for _, c := range cols {
		if err := reg.Register(c); err != nil {
			t.Fatal(err)
		}
	}
	rr := httptest.NewRecorder()
	promhttp.HandlerFor(reg, promhttp.HandlerOpts{}).ServeHTTP(rr, httptest.NewRequest("GET", "/metrics", nil))
	b, _ := io.ReadAll(rr.Body)
	return string(b)
}

// TestEventSeriesStartAtZero: every known event series and lag histogram is
// exported at zero before its first event, so that increase() over the
// first event sees it; warning events carry their rule's name.
func TestEventSeriesStartAtZero(t *testing.T) {
	p := pipeline.New(pipeline.NewRegistry(), nil, pipeline.Options{})
	e := NewEvents(p.SubscribeEvents("event_metrics"), Rule{Name: "over_boost", Severity: "critical"}, Rule{Name: "hot_oil", Severity: "warning"})
	body := scrapeText(t, e)
	for _, want := range []string{
		`plenum_events_total{kind="warning_raised",rule="over_boost"} 0`,
		`plenum_events_total{kind="warning_cleared",rule="over_boost"} 0`,
		`plenum_events_total{kind="warning_acknowledged",rule="hot_oil"} 0`,
		`plenum_events_total{kind="turbo_lag",rule=""} 0`,
		`plenum_events_total{kind="turbo_lag_discarded",rule=""} 0`,
		`plenum_events_total{kind="run_started",rule=""} 0`,
		`plenum_events_total{kind="run_ended",rule=""} 0`,
		`plenum_turbo_lag_seconds_count{figure="t10"} 0`,
		`plenum_turbo_lag_seconds_count{figure="t90"} 0`,
		`plenum_turbo_lag_seconds_count{figure="settling"} 0`,
		`plenum_turbo_lag_overshoot_ratio_count 0`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("before any event the scrape lacks %s", want)
		}
	}
	for _, ev := range []pipeline.Event{
		{Kind: "warning_raised", Name: "over_boost", Tags: map[string]string{"severity": "critical"}},
		{Kind: "turbo_lag", Name: "boost_response", Fields: map[string]float64{"t90_seconds": 0.8}},
		{Kind: "run_started", Name: "20261201-220000"},
	} {
		e.Observe(ev)
	}
	body = scrapeText(t, e)
	for _, want := range []string{
		`plenum_events_total{kind="warning_raised",rule="over_boost"} 1`,
		`plenum_events_total{kind="warning_raised",rule="hot_oil"} 0`,
		`plenum_events_total{kind="turbo_lag",rule=""} 1`,
		`plenum_events_total{kind="run_started",rule=""} 1`,
		`plenum_turbo_lag_seconds_count{figure="t90"} 1`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("after the events the scrape lacks %s", want)
		}
	}
	if strings.Contains(body, "20261201") {
		t.Error("a run's id became a label value (unbounded)")
	}
}

// TestWarningGaugeByRule: a warning rule's state is exported labelled by
// its rule and severity, not as a sensor.
func TestWarningGaugeByRule(t *testing.T) {
	reg := pipeline.NewRegistry()
	var ids []pipeline.ChannelID
	for _, name := range []string{"warning_over_boost", "warning_hot_oil"} {
		ch, ok := pipeline.Catalogued(name)
		if !ok {
			t.Fatalf("%s is not catalogued", name)
		}
		ch.Source = "derived"
		id, err := reg.Register(ch)
		if err != nil {
			t.Fatal(err)
		}
		ids = append(ids, id)
	}
	p := pipeline.New(reg, nil, pipeline.Options{})
	now := time.Unix(1000, 0)
	p.Process(pipeline.Sample{Channel: ids[0], Value: 1, Time: now})
	p.Process(pipeline.Sample{Channel: ids[1], Value: 0, Time: now})
	c, err := New(p, func() time.Time { return now })
	if err != nil {
		t.Fatal(err)
	}
	c.WithRules(Rule{Name: "over_boost", Severity: "critical"}, Rule{Name: "hot_oil", Severity: "warning"})
	body := scrapeText(t, c)
	for _, want := range []string{
		`plenum_warning_active{rule="over_boost",severity="critical"} 1`,
		`plenum_warning_active{rule="hot_oil",severity="warning"} 0`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("scrape lacks %s:\n%s", want, body)
		}
	}
	if strings.Contains(body, `sensor="over_boost"`) {
		t.Error("the warning gauge is still labelled by sensor")
	}
}
