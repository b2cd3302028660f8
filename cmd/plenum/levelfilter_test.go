package main

import (
	"bytes"
	"log/slog"
	"strings"
	"testing"
)

// The quiet logger keeps its level through With and WithGroup, as a
// wrapping handler must (the broker's logger is derived with With).
func TestQuietKeepsItsLevelThroughWith(t *testing.T) {
	var buf bytes.Buffer
	log := quiet(slog.New(slog.NewTextHandler(&buf, nil)))
	log.With("component", "broker").Info("chatter")
	log.WithGroup("g").Info("chatter")
	log.With("component", "broker").Warn("refused")
	if out := buf.String(); strings.Contains(out, "chatter") || !strings.Contains(out, "refused") || !strings.Contains(out, "component=broker") {
		t.Fatalf("log:\n%s", out)
	}
}
