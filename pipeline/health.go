package pipeline

import (
	"sort"
	"sync"
	"sync/atomic"
)

// Health is one source's health: whether it is up, and named counters of
// frames, errors, timeouts and so on. Safe for concurrent use.
type Health struct {
	name     string
	up       atomic.Bool
	mu       sync.Mutex
	counters map[string]*atomic.Uint64
}

// Name returns the source name.
func (h *Health) Name() string { return h.name }

// SetUp records whether the source is delivering.
func (h *Health) SetUp(up bool) { h.up.Store(up) }

// Up reports whether the source is delivering.
func (h *Health) Up() bool { return h.up.Load() }

// Counter returns the named counter, creating it at zero. Keep the pointer:
// it is the fast path.
func (h *Health) Counter(name string) *atomic.Uint64 {
	h.mu.Lock()
	defer h.mu.Unlock()
	c, ok := h.counters[name]
	if !ok {
		c = new(atomic.Uint64)
		h.counters[name] = c
	}
	return c
}

// Counters returns a sorted copy of all counters.
func (h *Health) Counters() []NamedCount {
	h.mu.Lock()
	defer h.mu.Unlock()
	out := make([]NamedCount, 0, len(h.counters))
	for k, v := range h.counters {
		out = append(out, NamedCount{k, v.Load()})
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Name < out[j].Name })
	return out
}

// NamedCount is one counter's value.
type NamedCount struct {
	Name  string
	Value uint64
}

// HealthSet holds the health of every source.
type HealthSet struct {
	mu      sync.Mutex
	sources map[string]*Health
}

// NewHealthSet returns an empty set.
func NewHealthSet() *HealthSet { return &HealthSet{sources: map[string]*Health{}} }

// Source returns the named source's health, creating it (down) when new.
func (s *HealthSet) Source(name string) *Health {
	s.mu.Lock()
	defer s.mu.Unlock()
	h, ok := s.sources[name]
	if !ok {
		h = &Health{name: name, counters: map[string]*atomic.Uint64{}}
		s.sources[name] = h
	}
	return h
}

// All returns the sources sorted by name.
func (s *HealthSet) All() []*Health {
	s.mu.Lock()
	defer s.mu.Unlock()
	out := make([]*Health, 0, len(s.sources))
	for _, h := range s.sources {
		out = append(out, h)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].name < out[j].name })
	return out
}

// HealthReport is what one part (a source or a publisher) says of itself when
// metrics are scraped. The Prometheus collector exports it as
// plenum_<Kind>_up{<Kind>="<Name>"}, plenum_<Kind>_<counter>_total and
// plenum_<Kind>_<gauge> with the same label, so every part reports the same way.
type HealthReport struct {
	Kind     string       // metric family: "source", "push", "mqtt", "recorder"
	Name     string       // the part's label value, e.g. "ecu_can0"
	Up       bool         // delivering (a source) or connected (a publisher)
	Counters []NamedCount // monotonic counts, snake_case names without _total
	Gauges   []NamedValue // levels, snake_case names with their unit
}

// NamedValue is one gauge's value.
type NamedValue struct {
	Name  string
	Value float64
}
