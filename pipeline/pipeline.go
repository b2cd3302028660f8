package pipeline

import (
	"context"
	"math"
	"runtime"
	"sync/atomic"
	"time"
)

// Pipeline is the core: drivers Put samples (fan-in), one ingest goroutine
// validates them, stores them, runs the dependent derivations and fans out
// every accepted and derived sample to the subscriptions.
type Pipeline struct {
	reg   *Registry
	store *Store
	graph *Graph
	chans []Channel
	in    chan []Sample // frames
	free  chan []Sample // frame buffers to reuse
	evIn  chan Event
	fan   fanout
	done  chan struct{}
	probe chan struct{} // taken by the ingest loop between frames (Probe)
	dirty []bool        // per node, in topological order: ProcessFrame's work list

	accepted  atomic.Uint64
	flagged   atomic.Uint64
	derived   atomic.Uint64
	rejected  atomic.Uint64
	inDropped atomic.Uint64
	emitting  atomic.Int64 // Emits in progress
}

// Options tune a pipeline.
type Options struct {
	// QueueSize bounds the fan-in queue between drivers and the ingest loop,
	// in frames (default 4096).
	QueueSize int
}

// New builds a pipeline over reg with the derivation graph g (which may be nil).
// All channels, including derived ones, must be registered before New.
func New(reg *Registry, g *Graph, opt Options) *Pipeline {
	if opt.QueueSize <= 0 {
		opt.QueueSize = 4096
	}
	if g == nil {
		g = &Graph{}
	}
	return &Pipeline{
		reg:   reg,
		store: NewStore(reg.Len()),
		graph: g,
		chans: reg.Channels(),
		in:    make(chan []Sample, opt.QueueSize),
		free:  make(chan []Sample, opt.QueueSize),
		evIn:  make(chan Event, 256),
		done:  make(chan struct{}),
		probe: make(chan struct{}),
		dirty: make([]bool, len(g.nodes)),
	}
}

// Registry returns the pipeline's channel registry.
func (p *Pipeline) Registry() *Registry { return p.reg }

// Store returns the latest-value store.
func (p *Pipeline) Store() *Store { return p.store }

// Subscribe adds a consumer with a queue of size samples. Subscribe before Run
// to see every sample from the start.
func (p *Pipeline) Subscribe(name string, size int) *Subscription {
	return p.fan.subscribe(name, size)
}

// SubscribeEvents adds a consumer that takes events only.
func (p *Pipeline) SubscribeEvents(name string) *Subscription {
	s := p.fan.subscribe(name, 1)
	s.eventsOnly = true
	return s
}

// Subscriptions lists the consumers, for drop counters.
func (p *Pipeline) Subscriptions() []*Subscription { return p.fan.list() }

// Put hands one sample to the pipeline as a frame of its own. It blocks only
// while the fan-in queue is full, and returns false once the pipeline has
// stopped.
func (p *Pipeline) Put(s Sample) bool {
	return p.PutFrame([]Sample{s})
}

// PutFrame hands the samples of one moment (the readings of one serial line,
// the values of one OBD answer) to the pipeline as one frame: they are stored
// together, and each derivation depending on any of them runs once, on the
// complete frame. The pipeline copies ss, so the caller may reuse it when
// PutFrame returns. It blocks only while the fan-in queue is full, and
// returns false once the pipeline has stopped.
func (p *Pipeline) PutFrame(ss []Sample) bool {
	if len(ss) == 0 {
		return true
	}
	select {
	case <-p.done:
		p.inDropped.Add(uint64(len(ss)))
		return false
	default:
	}
	var buf []Sample
	select {
	case buf = <-p.free:
	default:
	}
	buf = append(buf[:0], ss...)
	select {
	case p.in <- buf:
		return true
	case <-p.done:
		p.inDropped.Add(uint64(len(ss)))
		return false
	}
}

// take processes one queued frame and returns its buffer for reuse.
func (p *Pipeline) take(f []Sample) {
	p.ProcessFrame(f)
	select {
	case p.free <- f:
	default:
	}
}

// Emit hands an event to the pipeline for fan-out. Once Run has returned,
// the event is fanned out directly, so that what happens during a shutdown
// (a run closing, say) still reaches the recorder and the publishers.
func (p *Pipeline) Emit(e Event) {
	p.emitting.Add(1)
	defer p.emitting.Add(-1)
	select {
	case <-p.done:
		p.fan.event(e)
		return
	default:
	}
	select {
	case p.evIn <- e: // Run's loop, or its last sweep, takes it
	case <-p.done:
		p.fan.event(e)
	}
}

// Counters is a snapshot of the pipeline's own counters.
type Counters struct {
	Accepted, Flagged, Derived, Rejected, DroppedAfterStop uint64
}

// Counters returns the pipeline's counters.
func (p *Pipeline) Counters() Counters {
	return Counters{
		Accepted:         p.accepted.Load(),
		Flagged:          p.flagged.Load(),
		Derived:          p.derived.Load(),
		Rejected:         p.rejected.Load(),
		DroppedAfterStop: p.inDropped.Load(),
	}
}

// Run is the ingest loop. It returns when ctx is done, after processing what
// was already queued, and closes the pipeline for further Puts.
func (p *Pipeline) Run(ctx context.Context) error {
	defer func() {
		close(p.done)
		// An Emit that saw the pipeline running may still be putting its
		// event in the queue: wait for it, then sweep the queue once more.
		for p.emitting.Load() > 0 {
			runtime.Gosched()
		}
		for { // events queued while the loop was finishing
			select {
			case e := <-p.evIn:
				p.fan.event(e)
			default:
				return
			}
		}
	}()
	for {
		select {
		case f := <-p.in:
			p.take(f)
		case e := <-p.evIn:
			p.fan.event(e)
		case <-p.probe:
		case <-ctx.Done():
			for {
				select {
				case f := <-p.in:
					p.take(f)
				case e := <-p.evIn:
					p.fan.event(e)
				default:
					return nil
				}
			}
		}
	}
}

// ProcessFrame runs samples taken at one moment through validation, the
// store and the fan-out, then evaluates every derivation depending on any of
// them once, in topological order, at the latest of their times. Derived
// values are thus computed from the whole frame, not from each partly
// updated state in turn. Run calls it for every queued frame; replay and
// benchmarks may call it directly, from a single goroutine.
func (p *Pipeline) ProcessFrame(ss []Sample) {
	if len(ss) == 1 {
		p.Process(ss[0])
		return
	}
	var t time.Time
	work := false
	for _, s := range ss {
		if !p.accept(s) {
			continue
		}
		if s.Time.After(t) {
			t = s.Time
		}
		if int(s.Channel) < len(p.graph.dependents) {
			for _, n := range p.graph.dependents[s.Channel] {
				p.dirty[n.order] = true
				work = true
			}
		}
	}
	if !work {
		return
	}
	for i, n := range p.graph.nodes {
		if p.dirty[i] {
			p.dirty[i] = false
			p.evaluate(n, t)
		}
	}
}

// Process runs one sample, a frame of its own, through validation, the
// store, the derivations and the fan-out synchronously, from a single
// goroutine like ProcessFrame.
func (p *Pipeline) Process(s Sample) {
	if !p.accept(s) {
		return
	}
	if int(s.Channel) < len(p.graph.dependents) {
		for _, n := range p.graph.dependents[s.Channel] {
			p.evaluate(n, s.Time)
		}
	}
}

// accept validates s, stores it and fans it out; false if its channel is
// unknown.
func (p *Pipeline) accept(s Sample) bool {
	if int(s.Channel) >= len(p.chans) {
		p.rejected.Add(1)
		return false
	}
	c := &p.chans[s.Channel]
	if s.Quality == OK {
		if math.IsNaN(s.Value) || math.IsInf(s.Value, 0) {
			s.Quality = SensorFault
		} else if (c.Min != 0 || c.Max != 0) && (s.Value < c.Min || s.Value > c.Max) {
			s.Quality = OutOfRange
		}
	}
	if s.Quality != OK {
		p.flagged.Add(1)
	}
	p.accepted.Add(1)
	p.store.Set(s)
	p.fan.sample(s)
	return true
}

func (p *Pipeline) evaluate(n *node, t time.Time) {
	for i, id := range n.in {
		if id == noChannel {
			n.inBuf[i] = math.NaN()
			continue
		}
		v := p.store.getOwn(id)
		if !v.Set || !v.Quality.Usable() || t.Sub(v.Time) > n.inAge[i] {
			if n.inOpt[i] {
				n.inBuf[i] = math.NaN()
				continue
			}
			// A required input is missing, stale or faulty: no value, and the
			// previous outputs must not be taken as current downstream.
			for _, o := range n.out {
				p.store.MarkStale(o)
			}
			return
		}
		n.inBuf[i] = v.Value
	}
	written := n.d.Derive(t, n.inBuf, n.outBuf)
	for i, id := range n.out {
		if written&(1<<uint(i)) == 0 {
			continue
		}
		v := n.outBuf[i]
		q := OK
		if math.IsNaN(v) || math.IsInf(v, 0) {
			continue
		}
		ds := Sample{Channel: id, Quality: q, Time: t, Value: v}
		p.derived.Add(1)
		p.store.Set(ds)
		p.fan.sample(ds)
	}
}

// EventSink is implemented by derivations that emit events; the pipeline hands
// them an emitter before Run. The emitter must only be called from Derive.
type EventSink interface {
	SetEmitter(func(Event))
}

// BindEmitters gives every derivation of g that is an EventSink a function that
// fans its events out synchronously from the ingest goroutine.
func (p *Pipeline) BindEmitters() {
	for _, n := range p.graph.nodes {
		if es, ok := n.d.(EventSink); ok {
			es.SetEmitter(p.fan.event)
		}
	}
}
