// Package loglevel filters log lines by a level that may change while the
// daemon runs: a reload of the configuration sets it, and every logger
// derived from the filtered one follows.
package loglevel

import (
	"context"
	"log/slog"
)

// Handler passes to Next the records at or above Level. Level is read at
// each record (a *slog.LevelVar changes it live); nil means info.
type Handler struct {
	Next  slog.Handler
	Level slog.Leveler
}

// New returns a Handler over next, filtering by level.
func New(next slog.Handler, level slog.Leveler) *Handler {
	return &Handler{Next: next, Level: level}
}

// Enabled reports whether a record at l passes both the filter and Next.
func (h *Handler) Enabled(ctx context.Context, l slog.Level) bool {
	min := slog.LevelInfo
	if h.Level != nil {
		min = h.Level.Level()
	}
	return l >= min && h.Next.Enabled(ctx, l)
}

// Handle hands r to Next.
func (h *Handler) Handle(ctx context.Context, r slog.Record) error { return h.Next.Handle(ctx, r) }

// WithAttrs returns a filter over Next with attrs, by the same level.
func (h *Handler) WithAttrs(attrs []slog.Attr) slog.Handler {
	return &Handler{Next: h.Next.WithAttrs(attrs), Level: h.Level}
}

// WithGroup returns a filter over Next in group name, by the same level.
func (h *Handler) WithGroup(name string) slog.Handler {
	return &Handler{Next: h.Next.WithGroup(name), Level: h.Level}
}
