package pipeline

import (
	"sort"
	"sync"
	"sync/atomic"
)

// Health keeps one part's up flag and named counters in one place, for parts
// that count from several goroutines (a driver and its decoder). Report gives
// them in the shape the collector reads. The zero value is usable (Kind and
// Name then empty); safe for concurrent use.
type Health struct {
	kind, name string
	up         atomic.Bool
	mu         sync.Mutex
	counters   map[string]*atomic.Uint64
}

// NewHealth returns the health of the part name of the given kind ("source",
// "push", "mqtt", "recorder"), down and with no counters.
func NewHealth(kind, name string) *Health { return &Health{kind: kind, name: name} }

// Name returns the part's name.
func (h *Health) Name() string { return h.name }

// SetUp records whether the part is delivering.
func (h *Health) SetUp(up bool) { h.up.Store(up) }

// Up reports whether the part is delivering.
func (h *Health) Up() bool { return h.up.Load() }

// Counter returns the named counter, creating it at zero. Keep the pointer:
// it is the fast path.
func (h *Health) Counter(name string) *atomic.Uint64 {
	h.mu.Lock()
	defer h.mu.Unlock()
	c, ok := h.counters[name]
	if !ok {
		if h.counters == nil {
			h.counters = map[string]*atomic.Uint64{}
		}
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

// Report returns the part's up flag and counters.
func (h *Health) Report() HealthReport {
	return HealthReport{Kind: h.kind, Name: h.name, Up: h.Up(), Counters: h.Counters()}
}

// NamedCount is one counter's value.
type NamedCount struct {
	Name  string
	Value uint64
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

// Counter returns the value of r's counter name; false when r has none.
func (r HealthReport) Counter(name string) (uint64, bool) {
	for _, c := range r.Counters {
		if c.Name == name {
			return c.Value, true
		}
	}
	return 0, false
}

// Gauge returns the value of r's gauge name; false when r has none.
func (r HealthReport) Gauge(name string) (float64, bool) {
	for _, g := range r.Gauges {
		if g.Name == name {
			return g.Value, true
		}
	}
	return 0, false
}
