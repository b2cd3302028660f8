package promexport

import (
	"io"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"github.com/plenum-engine/plenum/pipeline"
)

func TestStaleChannelsDisappear(t *testing.T) {
	reg := pipeline.NewRegistry()
	mapID, _ := reg.Register(pipeline.Channel{Name: "manifold_pressure", Quantity: "pressure", Unit: pipeline.Pascal, Source: "mcu", Sensor: "manifold", MaxAge: time.Second})
	iatID, _ := reg.Register(pipeline.Channel{Name: "intake_air_temp", Quantity: "temperature", Unit: pipeline.Celsius, Source: "mcu", Sensor: "intake_air", MaxAge: time.Second, Min: -40, Max: 150})
	p := pipeline.New(reg, nil, pipeline.Options{})
	mcu := pipeline.NewHealth("source", "mcu")
	mcu.SetUp(true)
	mcu.Counter("frames").Add(7)
	push := reportFunc(func() pipeline.HealthReport {
		return pipeline.HealthReport{Kind: "push", Name: "push", Counters: []pipeline.NamedCount{{Name: "sent_lines", Value: 12}},
			Gauges: []pipeline.NamedValue{{Name: "backlog_bytes", Value: 4096}}}
	})
	now := time.Unix(1000, 0)
	p.Process(pipeline.Sample{Channel: mapID, Value: 101325, Time: now})
	p.Process(pipeline.Sample{Channel: iatID, Value: 300, Time: now}) // out of range: flagged
	clock := now
	c, err := New(p, func() time.Time { return clock }, mcu, push)
	if err != nil {
		t.Fatal(err)
	}
	h, err := Handler(c)
	if err != nil {
		t.Fatal(err)
	}
	get := func() string {
		rr := httptest.NewRecorder()
		h.ServeHTTP(rr, httptest.NewRequest("GET", "/metrics", nil))
		body, _ := io.ReadAll(rr.Body)
		parser := expfmt.NewTextParser(model.UTF8Validation)
		if _, err := parser.TextToMetricFamilies(strings.NewReader(string(body))); err != nil {
			t.Fatalf("exposition does not parse: %v", err)
		}
		return string(body)
	}
	body := get()
	for _, want := range []string{
		`plenum_pressure_pascals{sensor="manifold",source="mcu"} 101325`,
		`plenum_source_up{source="mcu"} 1`,
		`plenum_source_frames_total{source="mcu"} 7`,
		`plenum_push_up{push="push"} 0`,
		`plenum_push_sent_lines_total{push="push"} 12`,
		`plenum_push_backlog_bytes{push="push"} 4096`,
		`plenum_pipeline_samples_total{stage="flagged"} 1`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("scrape lacks %s", want)
		}
	}
	if strings.Contains(body, "plenum_temperature_celsius") {
		t.Error("a flagged (out-of-range) value was exported")
	}
	clock = now.Add(1500 * time.Millisecond)
	if body := get(); strings.Contains(body, "plenum_pressure_pascals{") {
		t.Error("a stale channel is still exported")
	}
}

func TestDuplicateMetricRejected(t *testing.T) {
	reg := pipeline.NewRegistry()
	reg.Register(pipeline.Channel{Name: "a", Quantity: "pressure", Unit: pipeline.Pascal, Source: "s", Sensor: "x"})
	reg.Register(pipeline.Channel{Name: "b", Quantity: "pressure", Unit: pipeline.Pascal, Source: "s", Sensor: "x"})
	if _, err := New(pipeline.New(reg, nil, pipeline.Options{}), time.Now); err == nil {
		t.Fatal("two channels with the same metric and labels accepted")
	}
}

func TestMetricName(t *testing.T) {
	cases := map[string]pipeline.Channel{
		"plenum_pressure_pascals": {Quantity: "pressure", Unit: pipeline.Pascal},
		"plenum_air_fuel_ratio":   {Quantity: "air_fuel_ratio", Unit: pipeline.Ratio},
		"plenum_gear":             {Quantity: "gear", Unit: pipeline.None},
		"plenum_engine_speed_rpm": {Quantity: "engine_speed", Unit: pipeline.RPM},
	}
	for want, c := range cases {
		if got := MetricName(c); got != want {
			t.Errorf("MetricName(%+v) = %s, want %s", c, got, want)
		}
	}
}

// reportFunc is a Reporter from a function.
type reportFunc func() pipeline.HealthReport

func (f reportFunc) Report() pipeline.HealthReport { return f() }
