package pipeline

import (
	"fmt"
	"regexp"
	"sync"
	"time"
)

// Unit is a canonical unit. Values inside Plenum are always in one of these;
// conversion to kPa, bar, psi or °F happens only at the publishing edges.
type Unit string

// Canonical units. Mass flow is in grams per second, the Prometheus base
// unit of mass; everything else is SI.
const (
	Pascal          Unit = "pascals"
	Celsius         Unit = "celsius"
	KilogramsPerSec Unit = "kilograms_per_second"
	GramsPerSec     Unit = "grams_per_second"
	Seconds         Unit = "seconds"
	Ratio           Unit = "ratio"
	Volts           Unit = "volts"
	Amperes         Unit = "amperes"
	RPM             Unit = "rpm"
	MetresPerSecond Unit = "meters_per_second"
	Watts           Unit = "watts"
	NewtonMetres    Unit = "newton_meters"
	Degrees         Unit = "degrees"
	CubicMetresPerS Unit = "cubic_meters_per_second"
	GramsPerJoule   Unit = "grams_per_joule"
	Count           Unit = "count"
	None            Unit = ""
)

// Channel describes one stream of values: a stable snake_case name of Plenum's own,
// the physical quantity, its canonical unit and where it comes from.
type Channel struct {
	Name     string        // e.g. "manifold_pressure"
	Quantity string        // e.g. "pressure"; names the Prometheus metric
	Unit     Unit          // canonical unit
	Source   string        // e.g. "serial", "obd", "derived"
	Sensor   string        // sensor label, bounded cardinality
	MaxAge   time.Duration // a value older than this is stale; 0 means 2 s
	Min, Max float64       // plausible range; both 0 means unchecked
	// Origin and Description come from the channel catalogue.
	Origin      Origin
	Description string // one sentence for people
}

var nameRE = regexp.MustCompile(`^[a-z][a-z0-9_]*$`)

// Validate checks the name and unit of a channel definition.
func (c Channel) Validate() error {
	if !nameRE.MatchString(c.Name) {
		return fmt.Errorf("channel %q: name must be snake_case", c.Name)
	}
	if c.Max < c.Min {
		return fmt.Errorf("channel %q: max %g below min %g", c.Name, c.Max, c.Min)
	}
	return nil
}

// Age returns the channel's maximum age, with the default applied.
func (c Channel) Age() time.Duration {
	if c.MaxAge <= 0 {
		return 2 * time.Second
	}
	return c.MaxAge
}

// Registry assigns dense IDs to channels. The zero value is an empty
// registry ready to use. It is safe for concurrent use; lookups after
// start-up take a read lock only.
type Registry struct {
	mu     sync.RWMutex
	byName map[string]ChannelID
	chans  []Channel
}

// NewRegistry returns an empty registry.
func NewRegistry() *Registry { return &Registry{byName: map[string]ChannelID{}} }

// Register adds a channel, or returns the ID of an identical existing one.
// Registering the same name with a different unit is an error.
func (r *Registry) Register(c Channel) (ChannelID, error) {
	if err := c.Validate(); err != nil {
		return 0, err
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.byName == nil {
		r.byName = map[string]ChannelID{}
	}
	if id, ok := r.byName[c.Name]; ok {
		if r.chans[id].Unit != c.Unit {
			return 0, fmt.Errorf("channel %q: registered as %q, now %q", c.Name, r.chans[id].Unit, c.Unit)
		}
		return id, nil
	}
	if len(r.chans) >= 1<<16-1 {
		return 0, fmt.Errorf("channel %q: registry full", c.Name)
	}
	id := ChannelID(len(r.chans))
	r.chans = append(r.chans, c)
	r.byName[c.Name] = id
	return id, nil
}

// Lookup returns the ID of a named channel.
func (r *Registry) Lookup(name string) (ChannelID, bool) {
	r.mu.RLock()
	defer r.mu.RUnlock()
	id, ok := r.byName[name]
	return id, ok
}

// Channel returns the definition of id.
func (r *Registry) Channel(id ChannelID) Channel {
	r.mu.RLock()
	defer r.mu.RUnlock()
	return r.chans[id]
}

// Len returns the number of registered channels.
func (r *Registry) Len() int {
	r.mu.RLock()
	defer r.mu.RUnlock()
	return len(r.chans)
}

// Channels returns a copy of all definitions, indexed by ID.
func (r *Registry) Channels() []Channel {
	r.mu.RLock()
	defer r.mu.RUnlock()
	return append([]Channel(nil), r.chans...)
}
