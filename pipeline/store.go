package pipeline

import (
	"sync"
	"time"
)

// Value is the latest reading held for one channel.
type Value struct {
	Value   float64
	Time    time.Time
	Quality Quality
	Set     bool // false until the channel has had a value
}

// Fresh reports whether v is set, usable and no older than maxAge at now.
func (v Value) Fresh(now time.Time, maxAge time.Duration) bool {
	return v.Set && v.Quality.Usable() && now.Sub(v.Time) <= maxAge
}

// Store holds the latest value of every channel, indexed by ChannelID.
// One goroutine (the pipeline's ingest loop) writes; any number read
// snapshots concurrently.
type Store struct {
	mu   sync.Mutex // a plain mutex: the writer takes it per sample, readers rarely
	vals []Value
}

// NewStore returns a store sized for n channels; it grows as needed.
func NewStore(n int) *Store { return &Store{vals: make([]Value, n)} }

// Set records s as the latest value of its channel.
func (st *Store) Set(s Sample) {
	st.mu.Lock()
	if int(s.Channel) >= len(st.vals) {
		st.grow(int(s.Channel) + 1)
	}
	st.vals[s.Channel] = Value{Value: s.Value, Time: s.Time, Quality: s.Quality, Set: true}
	st.mu.Unlock()
}

func (st *Store) grow(n int) {
	nv := make([]Value, n, 2*n)
	copy(nv, st.vals)
	st.vals = nv
}

// Get returns the latest value of id.
func (st *Store) Get(id ChannelID) Value {
	st.mu.Lock()
	defer st.mu.Unlock()
	if int(id) >= len(st.vals) {
		return Value{}
	}
	return st.vals[id]
}

// getOwn reads without the lock. Only the single writer (the ingest loop)
// may call it: its own writes cannot race with its own reads, and readers
// never write.
func (st *Store) getOwn(id ChannelID) Value {
	if int(id) >= len(st.vals) {
		return Value{}
	}
	return st.vals[id]
}

// Snapshot copies all latest values into dst (reused when large enough) and returns it.
func (st *Store) Snapshot(dst []Value) []Value {
	st.mu.Lock()
	defer st.mu.Unlock()
	dst = append(dst[:0], st.vals...)
	return dst
}

// MarkStale flags the latest value of id as stale, if it is set and OK.
func (st *Store) MarkStale(id ChannelID) {
	st.mu.Lock()
	if int(id) < len(st.vals) && st.vals[id].Set && st.vals[id].Quality == OK {
		st.vals[id].Quality = Stale
	}
	st.mu.Unlock()
}
