package pipeline

import (
	"sync"
	"sync/atomic"
	"time"
)

// Event is a record with a start, an end and fields: a lag measurement, a
// warning raised or cleared, a run started or ended. Events travel the same
// fan-out as samples.
type Event struct {
	Kind   string // e.g. "turbo_lag", "warning_raised", "warning_cleared", "run_started"
	Name   string // e.g. the rule or run name
	Start  time.Time
	End    time.Time
	Fields map[string]float64
	Tags   map[string]string
}

// Subscription is one consumer's bounded queue. The ingest loop never blocks on
// it: when the queue is full, new samples are dropped and counted. Drain from one
// goroutine; Dropped may be read from any.
type Subscription struct {
	name    string
	mu      sync.Mutex
	buf     []Sample
	head    int
	n       int
	events  []Event
	maxEv   int
	notify  chan struct{}
	dropped atomic.Uint64
	evDrop  atomic.Uint64
	// eventsOnly subscriptions take no samples.
	eventsOnly bool
}

// Name is the consumer name given to Subscribe.
func (s *Subscription) Name() string { return s.name }

// C is signalled when samples or events are waiting.
func (s *Subscription) C() <-chan struct{} { return s.notify }

// Dropped returns how many samples were dropped because the queue was full,
// and those the consumer counted as lost with CountLost.
func (s *Subscription) Dropped() uint64 { return s.dropped.Load() }

// CountLost counts n samples the consumer took but could not keep (a
// recorder whose disk refused them), so that Dropped, and with it
// plenum_consumer_dropped_samples_total, counts every sample the consumer
// lost.
func (s *Subscription) CountLost(n uint64) { s.dropped.Add(n) }

// DroppedEvents returns how many events were dropped because the queue was full.
func (s *Subscription) DroppedEvents() uint64 { return s.evDrop.Load() }

func (s *Subscription) push(x Sample) {
	if s.eventsOnly {
		return
	}
	s.mu.Lock()
	if s.n == len(s.buf) {
		s.mu.Unlock()
		s.dropped.Add(1)
		return
	}
	s.buf[(s.head+s.n)%len(s.buf)] = x
	s.n++
	s.mu.Unlock()
	s.signal()
}

func (s *Subscription) pushEvent(e Event) {
	s.mu.Lock()
	if len(s.events) >= s.maxEv {
		s.mu.Unlock()
		s.evDrop.Add(1)
		return
	}
	s.events = append(s.events, e)
	s.mu.Unlock()
	s.signal()
}

func (s *Subscription) signal() {
	select {
	case s.notify <- struct{}{}:
	default:
	}
}

// Drain appends all waiting samples to dst and all waiting events to evs and
// returns both.
func (s *Subscription) Drain(dst []Sample, evs []Event) ([]Sample, []Event) {
	s.mu.Lock()
	for s.n > 0 {
		dst = append(dst, s.buf[s.head])
		s.head = (s.head + 1) % len(s.buf)
		s.n--
	}
	evs = append(evs, s.events...)
	s.events = s.events[:0]
	s.mu.Unlock()
	return dst, evs
}

// fanout distributes samples and events to subscriptions. The list is
// copied on subscribe and read without a lock on the hot path.
type fanout struct {
	mu   sync.Mutex // serialises subscribe
	subs atomic.Pointer[[]*Subscription]
}

func (f *fanout) subscribe(name string, size int) *Subscription {
	if size <= 0 {
		size = 4096
	}
	s := &Subscription{name: name, buf: make([]Sample, size), maxEv: 1024, notify: make(chan struct{}, 1)}
	f.mu.Lock()
	var next []*Subscription
	if cur := f.subs.Load(); cur != nil {
		next = append(next, *cur...)
	}
	next = append(next, s)
	f.subs.Store(&next)
	f.mu.Unlock()
	return s
}

func (f *fanout) list() []*Subscription {
	if cur := f.subs.Load(); cur != nil {
		return append([]*Subscription(nil), *cur...)
	}
	return nil
}

func (f *fanout) sample(x Sample) {
	if cur := f.subs.Load(); cur != nil {
		for _, s := range *cur {
			s.push(x)
		}
	}
}

func (f *fanout) event(e Event) {
	if cur := f.subs.Load(); cur != nil {
		for _, s := range *cur {
			s.pushEvent(e)
		}
	}
}
