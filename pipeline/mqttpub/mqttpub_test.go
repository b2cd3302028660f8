package mqttpub

import (
	"encoding/json"
	"math"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

func TestEncodeEvent(t *testing.T) {
	e := pipeline.Event{Kind: "turbo_lag", Name: "pull", Start: time.Unix(10, 0), End: time.Unix(11, 500e6),
		Fields: map[string]float64{"t90_seconds": 0.8, "bad": math.NaN()}, Tags: map[string]string{"gear": "4"}}
	b, err := EncodeEvent(e)
	if err != nil {
		t.Fatal(err)
	}
	var got EventPayload
	if err := json.Unmarshal(b, &got); err != nil {
		t.Fatal(err)
	}
	if got.Kind != "turbo_lag" || got.End != "1970-01-01T00:00:11.5Z" || got.Fields["t90_seconds"] != 0.8 || got.Tags["gear"] != "4" {
		t.Fatalf("payload %s", b)
	}
	if _, ok := got.Fields["bad"]; ok {
		t.Fatal("NaN field was published")
	}
}

func TestVehicleMustBeATopicSegment(t *testing.T) {
	for _, v := range []string{"", "a/b", "car#1", "my car", "x+"} {
		if _, err := New(Config{Broker: "tcp://127.0.0.1:1", Vehicle: v}, pipeline.NewRegistry(), nil); err == nil {
			t.Errorf("vehicle %q accepted", v)
		}
	}
	p, err := New(Config{Broker: "tcp://127.0.0.1:1", Vehicle: "brackenfell-rs"}, pipeline.NewRegistry(), nil)
	if err != nil || p.Topic("ch/lambda") != "plenum/brackenfell-rs/ch/lambda" {
		t.Fatalf("topic %v %v", p, err)
	}
}
