package isotp

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/clock"
)

// PadMode selects how frames shorter than 8 bytes are sent.
type PadMode uint8

const (
	// PadDefault pads every frame to DLC 8 with DefaultPadding (0xCC).
	PadDefault PadMode = iota
	// PadWith pads every frame to DLC 8 with Config.PadValue.
	PadWith
	// PadNone sends frames with the shortest DLC (DLC optimisation).
	PadNone
)

// Config configures a Conn. TxID and RxID form the primary link: Send
// transmits on TxID and the peer answers (messages and FC) on RxID. Accept
// adds more responders, for functional requests answered by several ECUs.
type Config struct {
	// TxID is the CAN ID Send transmits on; FC for messages received on RxID goes here too.
	TxID uint32
	// RxID is the CAN ID the peer sends on.
	RxID uint32
	// Extended selects 29-bit identifiers for every ID of this Conn.
	Extended bool
	// FCDelay is how long to wait before sending a flow control frame
	// (N_Br in ISO 15765-2 terms); 0 sends at once. The Linux kernel's
	// can-isotp sender ignores an FC that arrives before it has processed
	// the echo of the block's last frame, which a fast peer on vcan can beat.
	FCDelay time.Duration
	// Accept, when set, accepts messages from further CAN IDs: it returns the
	// ID to send flow control on for a message arriving on rxID, and false to
	// ignore rxID. A multi-frame SendTo(txID) accepts FC from any rxID that
	// Accept maps to txID.
	Accept func(rxID uint32) (fcTxID uint32, ok bool)

	// BlockSize and STmin are announced in our FC frames when receiving.
	BlockSize uint8
	STmin     time.Duration
	// MaxLength is the longest message accepted (default 4095).
	MaxLength uint32
	// MaxWaits is how many consecutive FC Wait frames a send accepts before
	// it fails with ErrWaitLimit (default 10: Plenum's choice, ISO 15765-2
	// leaves N_WFTmax to the system, from memory).
	MaxWaits int

	// NBs is how long a send waits for each FC; NCr how long a receive waits
	// for the next CF. Defaults: GenericNBs, GenericNCr (1000 ms); use
	// OBDNBs/OBDNCr on an ISO 15765-4 OBD bus.
	NBs, NCr time.Duration

	// Padding and PadValue select frame padding (default 0xCC to DLC 8).
	// Received padding is never checked.
	Padding  PadMode
	PadValue byte
	// StrictDLC ignores received frames whose DLC is not 8.
	StrictDLC bool

	// Clock supplies time for STmin and timeouts (default the wall clock).
	Clock clock.Clock
	// Queue is the number of completed messages buffered for Receive
	// (default 64); when full, the oldest is dropped and counted.
	Queue int
}

// Message is one received ISO-TP message and the CAN ID it came from.
type Message struct {
	ID      uint32
	Payload []byte
}

// Stats counts what a Conn saw.
type Stats struct {
	FramesIn, FramesOut uint64
	MessagesIn          uint64
	MessagesOut         uint64
	Ignored             uint64 // frames ignored (ErrIgnored) from accepted IDs
	Aborted             uint64 // receptions aborted: wrong SN, short CF, N_Cr timeout, interrupted, too long (one each)
	Dropped             uint64 // completed messages dropped because Receive was not keeping up
	// UnexpectedFC counts flow control frames from an accepted ID that came
	// while no send was waiting for one (between sends, or in the middle of
	// a block) and were ignored.
	UnexpectedFC uint64
	// Interrupted counts receptions abandoned because the same sender began
	// a new message (SF or FF) before the last one was complete; each is
	// also counted in Aborted.
	Interrupted uint64
}

// Conn is an ISO-TP endpoint over a can.Bus. It reads the bus in its own
// goroutine from NewConn until Close; it must be the bus's only reader.
//
// Concurrency: Send/SendTo calls are serialised (one message in flight at a
// time); Receive may run concurrently with them.
type Conn struct {
	bus   can.Bus
	cfg   Config
	clock clock.Clock
	stmin byte

	ctx    context.Context
	cancel context.CancelFunc
	wg     sync.WaitGroup

	sendMu sync.Mutex
	tx     sender

	results chan result
	stats   struct {
		framesIn, framesOut, msgsIn, msgsOut, ignored, aborted, dropped atomic.Uint64
		unexpectedFC, interrupted                                       atomic.Uint64
	}
}

// txState is where the send in progress stands, as flow control sees it.
type txState uint8

const (
	// txIdle: no multi-frame send; every FC is unexpected.
	txIdle txState = iota
	// txSending: in the middle of a block; every FC is unexpected.
	txSending
	// txAwait: the FF or the last CF of a block is out or going out; the
	// next FC from the peer is applied.
	txAwait
	// txDone: an FC (Overflow, invalid FS, one Wait too many) or N_Bs ended
	// the send; every FC is unexpected.
	txDone
)

// sender is the flow-control state of the send in progress. The engine
// applies each FC to it as the FC arrives, under mu, so nothing is queued
// and nothing is lost however fast FCs come; the sending goroutine reads
// the outcome when wake tells it something changed.
//
// ISO 15765-2 has the sender wait for an FC only after the FF and after the
// last CF of a block, and ignore an FC that arrives at any other time (from
// memory of the standard's table for the unexpected arrival of an N_PDU).
// The wait begins here when the FF or last CF is handed to the bus, not
// when the bus confirms it: a peer on a virtual bus answers before the
// sending goroutine has resumed from the confirmation. An FC that the peer
// sent before that frame reached the wire but that arrives while the frame
// is being handed over is therefore taken as the answer, a window of one
// frame's transmission.
type sender struct {
	mu    sync.Mutex
	state txState
	id    uint32      // CAN ID of the send in progress
	waits int         // FC Wait frames since the FF or the block's last CF
	fc    FlowControl // the CTS that opened the next block
	err   error       // why the send ended, in txDone
	wake  chan struct{}
}

// expect makes the send on id wait for an FC, before the FF or the last CF
// of a block goes out.
func (s *sender) expect(id uint32) {
	s.mu.Lock()
	s.state, s.id, s.waits, s.err = txAwait, id, 0, nil
	s.mu.Unlock()
}

// finish ends the send: every later FC is unexpected.
func (s *sender) finish() {
	s.mu.Lock()
	s.state = txIdle
	s.mu.Unlock()
}

type result struct {
	m   Message
	err error
}

type peerRx struct {
	r    *Receiver
	fcTx uint32
	last time.Time
}

// NewConn validates cfg and starts reading bus.
func NewConn(bus can.Bus, cfg Config) (*Conn, error) {
	limit := can.MaxStandardID
	if cfg.Extended {
		limit = can.MaxExtendedID
	}
	if cfg.TxID > limit || cfg.RxID > limit {
		return nil, fmt.Errorf("isotp: config TxID 0x%X / RxID 0x%X exceed 0x%X", cfg.TxID, cfg.RxID, limit)
	}
	if cfg.TxID == cfg.RxID {
		return nil, fmt.Errorf("isotp: config TxID and RxID are both 0x%X", cfg.TxID)
	}
	stmin, err := EncodeSTmin(cfg.STmin)
	if err != nil {
		return nil, fmt.Errorf("isotp: config STmin: %w", err)
	}
	if cfg.Padding > PadNone {
		return nil, fmt.Errorf("isotp: config Padding %d unknown", cfg.Padding)
	}
	if cfg.MaxWaits < 0 || cfg.NBs < 0 || cfg.NCr < 0 || cfg.Queue < 0 {
		return nil, errors.New("isotp: config MaxWaits, NBs, NCr and Queue must not be negative")
	}
	if cfg.MaxLength == 0 {
		cfg.MaxLength = Max12BitLength
	}
	if cfg.MaxWaits == 0 {
		cfg.MaxWaits = 10
	}
	if cfg.NBs == 0 {
		cfg.NBs = GenericNBs
	}
	if cfg.NCr == 0 {
		cfg.NCr = GenericNCr
	}
	if cfg.Queue == 0 {
		cfg.Queue = 64
	}
	if cfg.Clock == nil {
		cfg.Clock = clock.System{}
	}
	c := &Conn{
		bus: bus, cfg: cfg, clock: cfg.Clock, stmin: stmin,
		results: make(chan result, cfg.Queue),
	}
	c.tx.wake = make(chan struct{}, 1)
	c.ctx, c.cancel = context.WithCancel(context.Background())
	frames := make(chan can.Frame, 64)
	busErr := make(chan error, 1)
	c.wg.Add(2)
	go c.read(frames, busErr)
	go c.engine(frames, busErr)
	return c, nil
}

// Stats returns a snapshot of the counters.
func (c *Conn) Stats() Stats {
	return Stats{
		FramesIn: c.stats.framesIn.Load(), FramesOut: c.stats.framesOut.Load(),
		MessagesIn: c.stats.msgsIn.Load(), MessagesOut: c.stats.msgsOut.Load(),
		Ignored: c.stats.ignored.Load(), Aborted: c.stats.aborted.Load(), Dropped: c.stats.dropped.Load(),
		UnexpectedFC: c.stats.unexpectedFC.Load(), Interrupted: c.stats.interrupted.Load(),
	}
}

// Close stops the Conn's goroutines; it does not close the bus. Blocked and
// later calls return ErrClosed.
func (c *Conn) Close() error {
	c.cancel()
	c.wg.Wait()
	return nil
}

// Receive returns the next message from the peer or any accepted responder,
// or an error for a reception that failed (ErrWrongSN, ErrTimeout,
// ErrShortFrame, ErrInterrupted, ErrTooLong, or a bus error); later
// messages still arrive after an error. An FF that is too long and
// interrupts a reception yields two errors, ErrInterrupted and then
// ErrTooLong. The payload belongs to the caller.
func (c *Conn) Receive(ctx context.Context) (Message, error) {
	select {
	case r := <-c.results:
		return r.m, r.err
	case <-ctx.Done():
		return Message{}, ctx.Err()
	case <-c.ctx.Done():
		return Message{}, ErrClosed
	}
}

// Send transmits payload to the primary peer (on TxID).
func (c *Conn) Send(ctx context.Context, payload []byte) error {
	return c.SendTo(ctx, c.cfg.TxID, payload)
}

// SendTo transmits payload as one ISO-TP message on CAN ID txID. Up to 7
// bytes go as a single frame (the only kind a functional request may use);
// longer payloads go as FF and CFs, paced by the FC frames of the peer that
// answers on RxID (for txID == TxID) or on an ID Accept maps to txID.
// It returns once the last frame was handed to the bus.
func (c *Conn) SendTo(ctx context.Context, txID uint32, payload []byte) error {
	n := len(payload)
	if n == 0 {
		return errors.New("isotp: send: empty payload")
	}
	if uint64(n) > MaxLength {
		return fmt.Errorf("isotp: send: payload of %d bytes exceeds %d", n, uint64(MaxLength))
	}
	c.sendMu.Lock()
	defer c.sendMu.Unlock()
	if c.ctx.Err() != nil {
		return ErrClosed
	}
	ctx, stop := c.joinCtx(ctx)
	defer stop()
	if n <= MaxSingleFrame {
		var d [8]byte
		d[0] = byte(n)
		copy(d[1:], payload)
		if err := c.put(ctx, txID, d[:], 1+n); err != nil {
			return err
		}
		c.stats.msgsOut.Add(1)
		return nil
	}
	// From here the FF's FC is expected; FCs before are not ours.
	c.tx.expect(txID)
	defer c.tx.finish()

	var d [8]byte
	var off int
	if n <= Max12BitLength {
		d[0], d[1] = pciFF<<4|byte(n>>8), byte(n)
		off = copy(d[2:], payload)
	} else {
		d[0], d[1] = pciFF<<4, 0
		d[2], d[3], d[4], d[5] = byte(n>>24), byte(n>>16), byte(n>>8), byte(n)
		off = copy(d[6:], payload)
	}
	if err := c.put(ctx, txID, d[:], 8); err != nil {
		return err
	}
	sn := byte(1)
	for off < n {
		fc, err := c.awaitCTS(ctx, txID)
		if err != nil {
			return err
		}
		gap := DecodeSTmin(fc.STmin)
		for sent := 0; off < n && (fc.BlockSize == 0 || sent < int(fc.BlockSize)); sent++ {
			if sent > 0 && gap > 0 {
				select {
				case <-c.clock.After(gap):
				case <-ctx.Done():
					return c.ctxErr(ctx)
				}
			}
			d = [8]byte{pciCF<<4 | sn}
			k := copy(d[1:], payload[off:])
			if off+k < n && fc.BlockSize > 0 && sent+1 == int(fc.BlockSize) {
				c.tx.expect(txID) // the block's last CF: its FC is next
			}
			if err := c.put(ctx, txID, d[:], 1+k); err != nil {
				return err
			}
			off += k
			sn = (sn + 1) & 0xF
		}
	}
	c.stats.msgsOut.Add(1)
	return nil
}

// awaitCTS waits for the ContinueToSend FC that opens the next block,
// following Wait frames, after the FF or a block's last CF was sent. N_Bs
// starts now, once the bus has taken the frame, and again after each Wait
// (ISO 15765-2 restarts N_Bs on FC Wait; from memory).
func (c *Conn) awaitCTS(ctx context.Context, txID uint32) (FlowControl, error) {
	s := &c.tx
	timer := c.clock.After(c.cfg.NBs)
	waits := 0
	for {
		s.mu.Lock()
		state, fc, err, w := s.state, s.fc, s.err, s.waits
		s.mu.Unlock()
		switch state {
		case txSending:
			return fc, nil
		case txDone:
			return fc, err
		}
		if w != waits {
			waits = w
			timer = c.clock.After(c.cfg.NBs)
		}
		select {
		case <-s.wake:
		case <-timer:
			s.mu.Lock()
			if s.state == txAwait { // else an FC came with the timer: it wins
				s.state = txDone
				s.err = fmt.Errorf("isotp: send on %X: no FC within N_Bs %v: %w", txID, c.cfg.NBs, ErrTimeout)
			}
			s.mu.Unlock()
		case <-ctx.Done():
			return FlowControl{}, c.ctxErr(ctx)
		}
	}
}

// joinCtx returns a context cancelled by ctx or by Close.
func (c *Conn) joinCtx(ctx context.Context) (context.Context, func()) {
	ctx, cancel := context.WithCancel(ctx)
	stop := context.AfterFunc(c.ctx, cancel)
	return ctx, func() { stop(); cancel() }
}

func (c *Conn) ctxErr(ctx context.Context) error {
	if c.ctx.Err() != nil {
		return ErrClosed
	}
	return ctx.Err()
}

// put sends data[:n] on id, padded as configured.
func (c *Conn) put(ctx context.Context, id uint32, data []byte, n int) error {
	f := can.Frame{ID: id, Extended: c.cfg.Extended, DLC: uint8(n)}
	copy(f.Data[:n], data[:n])
	if c.cfg.Padding != PadNone {
		pad := DefaultPadding
		if c.cfg.Padding == PadWith {
			pad = c.cfg.PadValue
		}
		for i := n; i < 8; i++ {
			f.Data[i] = pad
		}
		f.DLC = 8
	}
	if err := c.bus.Send(ctx, f); err != nil {
		if c.ctx.Err() != nil {
			return ErrClosed
		}
		return fmt.Errorf("isotp: send frame %v: %w", f, err)
	}
	c.stats.framesOut.Add(1)
	return nil
}

func (c *Conn) read(frames chan<- can.Frame, busErr chan<- error) {
	defer c.wg.Done()
	for {
		f, err := c.bus.Receive(c.ctx)
		if err != nil {
			if c.ctx.Err() != nil {
				return
			}
			if errors.Is(err, can.ErrClosed) {
				busErr <- err
				return
			}
			c.deliver(result{err: fmt.Errorf("isotp: bus receive: %w", err)})
			select { // back off before retrying a failing bus
			case <-c.clock.After(10 * time.Millisecond):
			case <-c.ctx.Done():
				return
			}
			continue
		}
		select {
		case frames <- f:
		case <-c.ctx.Done():
			return
		}
	}
}

func (c *Conn) accept(id uint32) (uint32, bool) {
	if id == c.cfg.RxID {
		return c.cfg.TxID, true
	}
	if c.cfg.Accept != nil {
		return c.cfg.Accept(id)
	}
	return 0, false
}

func (c *Conn) engine(frames <-chan can.Frame, busErr <-chan error) {
	defer c.wg.Done()
	peers := make(map[uint32]*peerRx)
	var timer <-chan time.Time
	for {
		select {
		case <-c.ctx.Done():
			return
		case err := <-busErr:
			c.deliver(result{err: fmt.Errorf("isotp: bus: %w", err)})
			return
		case <-timer:
			timer = nil
			now := c.clock.Now()
			var next time.Duration
			for id, p := range peers {
				if !p.r.Busy() {
					continue
				}
				if left := c.cfg.NCr - now.Sub(p.last); left > 0 {
					if next == 0 || left < next {
						next = left
					}
					continue
				}
				got := len(p.r.Message())
				p.r.Reset()
				c.stats.aborted.Add(1)
				c.deliver(result{m: Message{ID: id}, err: fmt.Errorf("isotp: receive from %X: no CF within N_Cr %v after %d bytes: %w", id, c.cfg.NCr, got, ErrTimeout)})
			}
			if next > 0 {
				timer = c.clock.After(next)
			}
		case f := <-frames:
			c.stats.framesIn.Add(1)
			if f.Extended != c.cfg.Extended || f.Remote {
				continue
			}
			fcTx, ok := c.accept(f.ID)
			if !ok {
				continue
			}
			if f.DLC > 0 && f.Data[0]>>4 == pciFC {
				c.flowControl(f, fcTx)
				continue
			}
			p := peers[f.ID]
			if p == nil {
				p = &peerRx{r: NewReceiver(ReceiverConfig{BlockSize: c.cfg.BlockSize, STmin: c.stmin, MaxLength: c.cfg.MaxLength, StrictDLC: c.cfg.StrictDLC}), fcTx: fcTx}
				peers[f.ID] = p
			}
			act, err := p.r.Feed(f)
			if err != nil {
				if errors.Is(err, ErrIgnored) {
					c.stats.ignored.Add(1)
				} else {
					c.receiveFailed(f.ID, err)
				}
			}
			switch act {
			case ActionFlowControl:
				fc := p.r.FlowControl()
				d := [3]byte{pciFC<<4 | byte(fc.Status), fc.BlockSize, fc.STmin}
				if c.cfg.FCDelay > 0 {
					select {
					case <-c.clock.After(c.cfg.FCDelay):
					case <-c.ctx.Done():
					}
				}
				if err := c.put(c.ctx, p.fcTx, d[:], 3); err != nil && c.ctx.Err() == nil {
					p.r.Reset()
					c.stats.aborted.Add(1)
					c.deliver(result{m: Message{ID: f.ID}, err: fmt.Errorf("isotp: receive from %X: flow control: %w", f.ID, err)})
				}
			case ActionComplete:
				c.stats.msgsIn.Add(1)
				c.deliver(result{m: Message{ID: f.ID, Payload: append([]byte(nil), p.r.Message()...)}})
			}
			if p.r.Busy() {
				p.last = c.clock.Now()
				if timer == nil {
					timer = c.clock.After(c.cfg.NCr)
				}
			}
		}
	}
}

// flowControl applies an FC from the peer to the send in progress: at once
// and in arrival order, so that a burst of Waits and the CTS behind it all
// count. An FC the sender is not waiting for is ignored and counted.
func (c *Conn) flowControl(f can.Frame, fcTx uint32) {
	fc, err := parseFlowControl(f.Data[:f.DLC])
	if err != nil && !errors.Is(err, ErrInvalidFS) {
		c.stats.ignored.Add(1)
		return
	}
	s := &c.tx
	s.mu.Lock()
	if s.state != txAwait || s.id != fcTx {
		s.mu.Unlock()
		c.stats.unexpectedFC.Add(1)
		return
	}
	switch fc.Status {
	case ContinueToSend:
		s.state, s.fc = txSending, fc
	case Wait:
		s.waits++
		if s.waits > c.cfg.MaxWaits {
			s.state = txDone
			s.err = fmt.Errorf("isotp: send on %X: %d FC Wait frames, limit %d: %w", fcTx, s.waits, c.cfg.MaxWaits, ErrWaitLimit)
		}
	case Overflow:
		s.state, s.err = txDone, fmt.Errorf("isotp: send on %X: %w", fcTx, ErrOverflow)
	default:
		s.state, s.err = txDone, fmt.Errorf("isotp: send on %X: FS %d: %w", fcTx, fc.Status, ErrInvalidFS)
	}
	s.mu.Unlock()
	select {
	case s.wake <- struct{}{}:
	default: // a wake-up is already pending; the state holds the news
	}
}

// receiveFailed reports and counts a reception that ended in err: each
// error of a joined err (an FF too long that also interrupted a message)
// is a result of its own.
func (c *Conn) receiveFailed(id uint32, err error) {
	if j, ok := err.(interface{ Unwrap() []error }); ok {
		for _, e := range j.Unwrap() {
			c.receiveFailed(id, e)
		}
		return
	}
	c.stats.aborted.Add(1)
	if errors.Is(err, ErrInterrupted) {
		c.stats.interrupted.Add(1)
	}
	c.deliver(result{m: Message{ID: id}, err: fmt.Errorf("isotp: receive from %X: %w", id, err)})
}

// deliver queues r for Receive, dropping the oldest result when full.
func (c *Conn) deliver(r result) {
	for {
		select {
		case c.results <- r:
			return
		default:
		}
		select {
		case <-c.results:
			c.stats.dropped.Add(1)
		default:
		}
	}
}
