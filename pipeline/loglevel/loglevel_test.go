package loglevel

import (
	"bytes"
	"log/slog"
	"strings"
	"testing"
)

// A change of the level applies at once, to derived loggers too, and
// never lets through what the next handler refuses.
func TestLevelChangesLive(t *testing.T) {
	var out bytes.Buffer
	lv := new(slog.LevelVar)
	log := slog.New(New(slog.NewTextHandler(&out, &slog.HandlerOptions{Level: slog.LevelDebug}), lv))
	sub := log.With("part", "x").WithGroup("g")
	for _, tc := range []struct {
		level       slog.Level
		debug, warn bool
	}{
		{slog.LevelInfo, false, true},
		{slog.LevelDebug, true, true},
		{slog.LevelError, false, false},
	} {
		out.Reset()
		lv.Set(tc.level)
		log.Debug("d1")
		sub.Debug("d2")
		log.Warn("w1")
		sub.Warn("w2")
		s := out.String()
		if got := strings.Contains(s, "d1") && strings.Contains(s, "d2"); got != tc.debug {
			t.Errorf("level %v: debug lines written %v, want %v:\n%s", tc.level, got, tc.debug, s)
		}
		if got := strings.Contains(s, "w1") && strings.Contains(s, "w2"); got != tc.warn {
			t.Errorf("level %v: warn lines written %v, want %v:\n%s", tc.level, got, tc.warn, s)
		}
	}
	out.Reset()
	lv.Set(slog.LevelDebug)
	strict := slog.New(New(slog.NewTextHandler(&out, nil), lv)) // the next handler stops at info
	strict.Debug("hidden")
	if out.Len() != 0 {
		t.Errorf("a line the next handler refuses was written: %s", out.String())
	}
	if !New(slog.NewTextHandler(&out, nil), nil).Enabled(t.Context(), slog.LevelInfo) {
		t.Error("nil level: info refused")
	}
}
