package broker

import (
	"fmt"
	"log/slog"
	"strings"
	"testing"
	"time"

	mqtt "github.com/mochi-mqtt/server/v2"
)

// A client trying many user names keeps at most maxBursts bursts open, and
// every refusal is still logged or summed.
func TestBurstLogBounded(t *testing.T) {
	logs := &capture{}
	now := time.Date(2026, 12, 1, 22, 0, 0, 0, time.UTC)
	b := &burstLog{log: slog.New(logs), every: time.Minute, now: func() time.Time { return now }}
	cl := &mqtt.Client{ID: "guesser"}
	for i := 0; i < 3*maxBursts; i++ {
		b.refuse("connection", fmt.Sprintf("user%d", i), cl, "", "unknown user")
		b.refuse("connection", fmt.Sprintf("user%d", i), cl, "", "unknown user")
		if len(b.open) > maxBursts {
			t.Fatalf("%d bursts open after %d users", len(b.open), i+1)
		}
	}
	b.flush()
	// Every refusal is either a first line or one repeat in a summary
	// (each summary here sums one repeat).
	first := len(logs.matching("broker refused a connection user="))
	sums := logs.matching("broker refused a connection (repeated)")
	for _, l := range sums {
		if !strings.Contains(l, "repeats=1 ") {
			t.Fatalf("summary %q, want repeats=1", l)
		}
	}
	if first+len(sums) != 2*3*maxBursts {
		t.Errorf("%d first lines + %d summed repeats, want %d refusals", first, len(sums), 2*3*maxBursts)
	}
}
