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

// TestStatusAndSnapshotWireFormat pins the status and snapshot payloads to
// the bytes they had before they had types of their own (keys in name
// order), so that followers and dashboards read what they always read.
func TestStatusAndSnapshotWireFormat(t *testing.T) {
	p, err := New(Config{Broker: "tcp://127.0.0.1:1", Vehicle: "brackenfell-rs", Version: "v1"}, pipeline.NewRegistry(), nil)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		got, want string
	}{
		{string(p.statusPayload("online", time.Date(2026, 12, 1, 22, 0, 0, 5e8, time.UTC))),
			`{"notice":"advisory only, not a safety system","since":"2026-12-01T22:00:00.5Z","state":"online","vehicle":"brackenfell-rs","version":"v1"}`},
		{string(p.statusPayload("offline", time.Time{})),
			`{"notice":"advisory only, not a safety system","state":"offline","vehicle":"brackenfell-rs","version":"v1"}`},
	} {
		if c.got != c.want {
			t.Errorf("status payload\n got %s\nwant %s", c.got, c.want)
		}
	}
	b, err := json.Marshal(Snapshot{T: "2026-12-01T22:00:00Z", Channels: map[string]Value{"lambda": {V: 0.98, Unit: "ratio", Quality: "ok", Time: "2026-12-01T22:00:00Z"}}})
	if err != nil {
		t.Fatal(err)
	}
	if want := `{"channels":{"lambda":{"v":0.98,"unit":"ratio","q":"ok","t":"2026-12-01T22:00:00Z"}},"t":"2026-12-01T22:00:00Z"}`; string(b) != want {
		t.Errorf("snapshot payload\n got %s\nwant %s", b, want)
	}
}
