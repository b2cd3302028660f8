package can

import (
	"container/heap"
	"context"
	"fmt"
	"math/rand/v2"
	"slices"
	"sync"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
)

// VirtualConfig configures a VirtualBus. The zero value is a bus without
// a wire-time model (frames take no time) and no faults.
type VirtualConfig struct {
	// BitRate in bit/s. When > 0 each frame occupies the wire for
	// FrameBits(f, Stuffing)/BitRate and frames are serialised; 0 disables timing.
	BitRate int
	// Stuffing selects how stuff bits are counted (default StuffActual).
	Stuffing Stuffing
	// Clock supplies time (default clock.System).
	Clock clock.Clock
	// RxQueue is each node's receive queue length in frames (default 1024).
	// A frame arriving at a full queue is dropped for that node and counted
	// in VirtualStats.Overruns, as a CAN controller's overrun would be.
	RxQueue int
	// ReorderHold is how long a frame marked Fault.Reorder waits for a later
	// frame to overtake it before it is delivered anyway (default 5 ms).
	ReorderHold time.Duration
}

// Fault is what fault injection does to one transmitted frame.
type Fault struct {
	// Drop loses the frame for every receiver (the sender still sees it sent).
	Drop bool
	// Corrupt flips bit CorruptBit (0–63, bit 7 of Data[0] is 0) of the
	// delivered data, modelling corruption the CRC did not catch (a faulty
	// gateway or controller). A frame with fewer data bits is delivered unchanged.
	Corrupt    bool
	CorruptBit uint8
	// Delay postpones delivery to the receivers by this much after the frame
	// left the wire; later frames with smaller delays overtake it.
	Delay time.Duration
	// Reorder holds the frame back and delivers it right after the next frame
	// (or after VirtualConfig.ReorderHold if no frame follows).
	Reorder bool
}

// FaultFunc decides the fault for each frame as it leaves the wire. It is
// called from the bus's own goroutine, one frame at a time, so it may keep
// unsynchronised state.
type FaultFunc func(f Frame) Fault

// RandomFaults configures RandomFaultFunc.
type RandomFaults struct {
	// Seed makes the sequence of decisions reproducible.
	Seed uint64
	// Drop, Corrupt and Reorder are probabilities 0–1 per frame.
	Drop, Corrupt, Reorder float64
	// DelayMin and DelayMax bound a uniformly drawn delivery delay.
	DelayMin, DelayMax time.Duration
	// IDs restricts faults to frames with these identifiers (empty: all frames).
	IDs []uint32
}

// RandomFaultFunc returns a FaultFunc drawing faults from a seeded PCG
// generator as cfg describes.
func RandomFaultFunc(cfg RandomFaults) FaultFunc {
	rng := rand.New(rand.NewPCG(cfg.Seed, cfg.Seed^0x9E3779B97F4A7C15))
	return func(f Frame) Fault {
		if len(cfg.IDs) > 0 && !slices.Contains(cfg.IDs, f.ID) {
			return Fault{}
		}
		var ft Fault
		ft.Drop = rng.Float64() < cfg.Drop
		if rng.Float64() < cfg.Corrupt {
			ft.Corrupt = true
			ft.CorruptBit = uint8(rng.IntN(64))
		}
		ft.Reorder = rng.Float64() < cfg.Reorder
		ft.Delay = cfg.DelayMin
		if span := cfg.DelayMax - cfg.DelayMin; span > 0 {
			ft.Delay += time.Duration(rng.Int64N(int64(span) + 1))
		}
		return ft
	}
}

// VirtualStats counts what a VirtualBus did.
type VirtualStats struct {
	Frames    uint64        // frames transmitted on the wire
	Bits      uint64        // bit times used by those frames
	WireTime  time.Duration // sum of the frames' durations
	Dropped   uint64        // frames lost by fault injection
	Corrupted uint64        // frames corrupted by fault injection
	Delayed   uint64        // frames delivered late by fault injection
	Reordered uint64        // frames held back by fault injection
	Overruns  uint64        // per-node deliveries lost to a full receive queue
}

// VirtualBus is an in-process CAN bus joining any number of nodes. One frame
// is on the wire at a time; when several nodes have a frame queued, the one
// with the lowest arbitration field (lowest ID; base format before extended
// with the same base ID; data before remote) wins, and each node sends its own
// frames in order. A node does not receive its own frames.
//
// Create it with NewVirtualBus, add nodes with NewNode, and Close it when done.
type VirtualBus struct {
	cfg   VirtualConfig
	clock clock.Clock

	mu      sync.Mutex
	nodes   []*VirtualNode
	faults  FaultFunc
	stats   VirtualStats
	closed  bool
	kick    chan struct{}
	done    chan struct{}
	stopped chan struct{}

	delayed   delayHeap
	delayKick chan struct{}
	seq       uint64
}

// NewVirtualBus starts a virtual bus. It validates cfg.
func NewVirtualBus(cfg VirtualConfig) (*VirtualBus, error) {
	if cfg.BitRate < 0 {
		return nil, fmt.Errorf("can: virtual bus: BitRate %d must not be negative", cfg.BitRate)
	}
	if cfg.Stuffing > StuffNone {
		return nil, fmt.Errorf("can: virtual bus: unknown Stuffing %d", cfg.Stuffing)
	}
	if cfg.RxQueue < 0 {
		return nil, fmt.Errorf("can: virtual bus: RxQueue %d must not be negative", cfg.RxQueue)
	}
	if cfg.RxQueue == 0 {
		cfg.RxQueue = 1024
	}
	if cfg.ReorderHold <= 0 {
		cfg.ReorderHold = 5 * time.Millisecond
	}
	if cfg.Clock == nil {
		cfg.Clock = clock.System{}
	}
	b := &VirtualBus{
		cfg:       cfg,
		clock:     cfg.Clock,
		kick:      make(chan struct{}, 1),
		done:      make(chan struct{}),
		stopped:   make(chan struct{}),
		delayKick: make(chan struct{}, 1),
	}
	go b.run()
	go b.deliverDelayed()
	return b, nil
}

// NewNode attaches a new node to the bus. The node is a Bus; closing it
// detaches it. After the bus is closed NewNode returns a closed node.
func (b *VirtualBus) NewNode() *VirtualNode {
	n := &VirtualNode{bus: b, rx: make(chan Frame, b.cfg.RxQueue), closed: make(chan struct{})}
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.closed {
		close(n.closed)
		return n
	}
	b.nodes = append(b.nodes, n)
	return n
}

// SetFaults installs fn as the fault injector (nil: no faults).
func (b *VirtualBus) SetFaults(fn FaultFunc) {
	b.mu.Lock()
	b.faults = fn
	b.mu.Unlock()
}

// StartBabbler attaches a babbling node that keeps f queued for transmission
// without pause, as a faulty controller stuck retransmitting would. Frames
// with a higher arbitration field than f then never win the bus. stop
// detaches the babbler.
func (b *VirtualBus) StartBabbler(f Frame) (stop func(), err error) {
	if err := f.Validate(); err != nil {
		return nil, err
	}
	n := &VirtualNode{bus: b, closed: make(chan struct{}), babble: &f}
	b.mu.Lock()
	if b.closed {
		b.mu.Unlock()
		return nil, ErrClosed
	}
	b.nodes = append(b.nodes, n)
	b.mu.Unlock()
	b.wake()
	return func() { _ = n.Close() }, nil
}

// Stats returns a snapshot of the bus counters.
func (b *VirtualBus) Stats() VirtualStats {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.stats
}

// Close stops the bus and closes every node.
func (b *VirtualBus) Close() error {
	b.mu.Lock()
	if b.closed {
		b.mu.Unlock()
		return nil
	}
	b.closed = true
	nodes := b.nodes
	b.nodes = nil
	close(b.done)
	b.mu.Unlock()
	for _, n := range nodes {
		n.closeOnce()
	}
	<-b.stopped
	return nil
}

func (b *VirtualBus) wake() {
	select {
	case b.kick <- struct{}{}:
	default:
	}
}

// pick removes and returns the winning queued request, or nil.
func (b *VirtualBus) pick() (*txReq, *VirtualNode) {
	var best *txReq
	var bestNode *VirtualNode
	var bestKey uint32
	for _, n := range b.nodes {
		var r *txReq
		switch {
		case n.babble != nil:
			r = &txReq{f: *n.babble}
		case len(n.txq) > 0:
			r = n.txq[0]
		default:
			continue
		}
		k := arbitrationKey(&r.f)
		if best == nil || k < bestKey {
			best, bestNode, bestKey = r, n, k
		}
	}
	if best != nil && bestNode.babble == nil {
		bestNode.txq = bestNode.txq[1:]
		best.onWire = true
	}
	return best, bestNode
}

// run is the wire: it arbitrates, times and delivers one frame at a time.
func (b *VirtualBus) run() {
	defer close(b.stopped)
	var busyUntil time.Time
	var held *heldFrame
	for {
		b.mu.Lock()
		req, from := b.pick()
		b.mu.Unlock()
		if req == nil {
			var hold <-chan time.Time
			if held != nil {
				hold = b.clock.After(b.cfg.ReorderHold)
			}
			select {
			case <-b.kick:
				continue
			case <-hold:
				b.deliver(held.f, held.from, 0)
				held = nil
				continue
			case <-b.done:
				return
			}
		}
		d := FrameDuration(req.f, b.cfg.BitRate, b.cfg.Stuffing)
		if d > 0 {
			now := b.clock.Now()
			if busyUntil.Before(now) {
				busyUntil = now
			}
			busyUntil = busyUntil.Add(d)
			if wait := busyUntil.Sub(now); wait > 0 {
				select {
				case <-b.clock.After(wait):
				case <-b.done:
					req.finish(ErrClosed)
					return
				}
			}
		}
		b.mu.Lock()
		fn := b.faults
		b.stats.Frames++
		b.stats.Bits += uint64(FrameBits(req.f, b.cfg.Stuffing))
		b.stats.WireTime += d
		b.mu.Unlock()
		f := req.f
		var ft Fault
		if fn != nil {
			ft = fn(f)
		}
		req.finish(nil)
		if ft.Drop {
			b.count(func(s *VirtualStats) { s.Dropped++ })
			continue
		}
		if ft.Corrupt && !f.Remote && int(ft.CorruptBit) < 8*int(f.DLC) {
			f.Data[ft.CorruptBit/8] ^= 0x80 >> (ft.CorruptBit % 8)
			b.count(func(s *VirtualStats) { s.Corrupted++ })
		}
		if ft.Reorder && held == nil {
			held = &heldFrame{f: f, from: from}
			b.count(func(s *VirtualStats) { s.Reordered++ })
			continue
		}
		b.deliver(f, from, ft.Delay)
		if held != nil {
			b.deliver(held.f, held.from, 0)
			held = nil
		}
	}
}

type heldFrame struct {
	f    Frame
	from *VirtualNode
}

func (b *VirtualBus) count(fn func(*VirtualStats)) {
	b.mu.Lock()
	fn(&b.stats)
	b.mu.Unlock()
}

// deliver hands f to every node but from, now or after delay.
func (b *VirtualBus) deliver(f Frame, from *VirtualNode, delay time.Duration) {
	b.mu.Lock()
	defer b.mu.Unlock()
	if delay > 0 {
		b.seq++
		heap.Push(&b.delayed, delayed{at: b.clock.Now().Add(delay), seq: b.seq, f: f, from: from})
		b.stats.Delayed++
		select {
		case b.delayKick <- struct{}{}:
		default:
		}
		return
	}
	b.fanOutLocked(f, from)
}

func (b *VirtualBus) fanOutLocked(f Frame, from *VirtualNode) {
	for _, n := range b.nodes {
		if n == from || n.babble != nil {
			continue
		}
		select {
		case n.rx <- f:
		default:
			b.stats.Overruns++
		}
	}
}

// deliverDelayed releases delayed frames in (time, sequence) order.
func (b *VirtualBus) deliverDelayed() {
	for {
		b.mu.Lock()
		var wait <-chan time.Time
		for len(b.delayed) > 0 {
			next := b.delayed[0]
			d := next.at.Sub(b.clock.Now())
			if d > 0 {
				wait = b.clock.After(d)
				break
			}
			heap.Pop(&b.delayed)
			b.fanOutLocked(next.f, next.from)
		}
		b.mu.Unlock()
		select {
		case <-wait:
		case <-b.delayKick:
		case <-b.done:
			return
		}
	}
}

type delayed struct {
	at   time.Time
	seq  uint64
	f    Frame
	from *VirtualNode
}

type delayHeap []delayed

func (h delayHeap) Len() int { return len(h) }
func (h delayHeap) Less(i, j int) bool {
	if h[i].at.Equal(h[j].at) {
		return h[i].seq < h[j].seq
	}
	return h[i].at.Before(h[j].at)
}
func (h delayHeap) Swap(i, j int) { h[i], h[j] = h[j], h[i] }
func (h *delayHeap) Push(x any)   { *h = append(*h, x.(delayed)) }
func (h *delayHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}

type txReq struct {
	f      Frame
	done   chan error
	onWire bool
}

func (r *txReq) finish(err error) {
	if r.done != nil {
		r.done <- err
	}
}

// VirtualNode is one node on a VirtualBus; it implements Bus.
type VirtualNode struct {
	bus    *VirtualBus
	rx     chan Frame
	txq    []*txReq // guarded by bus.mu
	closed chan struct{}
	once   sync.Once
	babble *Frame
}

// Send queues f for transmission and returns once f has left the wire (won
// arbitration and was transmitted), like a controller's transmit
// confirmation. If ctx ends first while f is still queued, f is withdrawn and
// ctx.Err() returned; once f is on the wire Send waits for it to finish.
func (n *VirtualNode) Send(ctx context.Context, f Frame) error {
	if err := f.Validate(); err != nil {
		return err
	}
	r := &txReq{f: f, done: make(chan error, 1)}
	b := n.bus
	b.mu.Lock()
	select {
	case <-n.closed:
		b.mu.Unlock()
		return ErrClosed
	default:
	}
	n.txq = append(n.txq, r)
	b.mu.Unlock()
	b.wake()
	select {
	case err := <-r.done:
		return err
	case <-ctx.Done():
	case <-n.closed:
	}
	b.mu.Lock()
	if !r.onWire {
		if i := slices.Index(n.txq, r); i >= 0 {
			n.txq = slices.Delete(n.txq, i, i+1)
		}
		b.mu.Unlock()
		if ctx.Err() != nil {
			return ctx.Err()
		}
		return ErrClosed
	}
	b.mu.Unlock()
	select {
	case err := <-r.done:
		return err
	case <-b.stopped:
		return ErrClosed
	}
}

// Receive returns the next frame another node sent.
func (n *VirtualNode) Receive(ctx context.Context) (Frame, error) {
	select {
	case <-n.closed:
		return Frame{}, ErrClosed
	default:
	}
	select {
	case f := <-n.rx:
		return f, nil
	case <-ctx.Done():
		return Frame{}, ctx.Err()
	case <-n.closed:
		return Frame{}, ErrClosed
	}
}

// Close detaches the node; blocked and later calls return ErrClosed.
func (n *VirtualNode) Close() error {
	b := n.bus
	b.mu.Lock()
	if i := slices.Index(b.nodes, n); i >= 0 {
		b.nodes = slices.Delete(b.nodes, i, i+1)
	}
	b.mu.Unlock()
	n.closeOnce()
	b.wake()
	return nil
}

func (n *VirtualNode) closeOnce() { n.once.Do(func() { close(n.closed) }) }
