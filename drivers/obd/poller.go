package obd

import (
	"context"
	"errors"
	"fmt"
	"sort"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline"
)

var errShortOrWrong = errors.New("obd: signal response does not echo the requested PID")

// Reading is one decoded value: the channel (a standard ChannelIndex, or
// NumStandardChannels()+i for Config.Signals[i]) and the value in canonical
// units.
type Reading struct {
	Channel ChannelIndex
	Value   float64
}

// EmitFunc receives the values decoded from one response message, as one
// frame: the ECU, the receive time from the Poller's Clock and the readings
// (at least one) in the order the message carried them. The Poller reuses
// the readings slice once EmitFunc returns. It is called from the ECU's
// worker goroutine; different ECUs call it concurrently. It must not block
// for long: it delays that ECU's polling.
type EmitFunc func(ecu Addr, t time.Time, readings []Reading)

// PollChannel asks for one standard channel at a target interval.
type PollChannel struct {
	Name     string        // standard channel name, e.g. "ecu_engine_speed"
	Interval time.Duration // target time between readings; > 0
	Priority int           // 0 (lowest) … MaxPriority; breaks ties toward urgent channels
}

// PollSignal asks for one user-defined signal at a target interval.
type PollSignal struct {
	Signal
	Interval time.Duration
	Priority int
}

// MaxPriority is the largest PollChannel.Priority.
const MaxPriority = 9

// Config configures a Poller. Zero durations take the defaults shown.
type Config struct {
	Transport Transport
	Clock     clock.Clock // default clock.System
	Format    Format      // identifier format of the bus
	ECUs      []Addr      // physical ECUs to poll; empty: discover them
	Channels  []PollChannel
	Signals   []PollSignal
	Emit      EmitFunc // required

	// DiscoveryWindow is how long responders to the functional PID 00 request
	// are collected. Default 200 ms (P2 = 50 ms per the ISO 15765-3 / ISO 14229-2 timing table, plus margin).
	DiscoveryWindow time.Duration
	// InitialTimeout is the response timeout before any response time is
	// measured. Default 150 ms.
	InitialTimeout time.Duration
	// MinTimeout and MaxTimeout bound the adaptive timeout. Defaults 50 ms
	// (P2 server max, ISO 15765-3 / ISO 14229-2) and 2 s.
	MinTimeout, MaxTimeout time.Duration
	// PendingTimeout is the wait after NRC 0x78. Default 5000 ms (P2*, ISO 15765-3 / ISO 14229-2;
	// timing table).
	PendingTimeout time.Duration
	// PriorityStep is the scheduling credit per priority level. Default 10 ms.
	PriorityStep time.Duration
	// MaxBackoff bounds the retry delay of a failing item and of rediscovery. Default 5 s.
	MaxBackoff time.Duration
	// SinglePID disables multi-PID service 01 requests from the start.
	SinglePID bool
}

// Poller polls ECUs: one request outstanding per ECU, ECUs concurrently.
type Poller struct {
	cfg    Config
	sc     schedConfig
	items  []item
	sendMu sync.Mutex
	mu     sync.Mutex
	ecus   []*ecuSched
	ran    atomic.Bool
	disc   struct{ requests, rounds, receiveErrors, unsolicited, dropped atomic.Uint64 }
}

// NewPoller validates cfg and returns a Poller; Run starts it.
func NewPoller(cfg Config) (*Poller, error) {
	if cfg.Transport == nil {
		return nil, errors.New("obd: Config.Transport is nil")
	}
	if cfg.Emit == nil {
		return nil, errors.New("obd: Config.Emit is nil")
	}
	if cfg.Clock == nil {
		cfg.Clock = clock.System{}
	}
	if cfg.Format != ID11 && cfg.Format != ID29 {
		return nil, fmt.Errorf("obd: Config.Format %d unknown", uint8(cfg.Format))
	}
	def := func(d *time.Duration, v time.Duration) {
		if *d <= 0 {
			*d = v
		}
	}
	def(&cfg.DiscoveryWindow, 200*time.Millisecond)
	def(&cfg.InitialTimeout, 150*time.Millisecond)
	def(&cfg.MinTimeout, 50*time.Millisecond)
	def(&cfg.MaxTimeout, 2*time.Second)
	def(&cfg.PendingTimeout, 5000*time.Millisecond)
	def(&cfg.PriorityStep, 10*time.Millisecond)
	def(&cfg.MaxBackoff, 5*time.Second)
	if cfg.MinTimeout > cfg.MaxTimeout {
		return nil, fmt.Errorf("obd: Config.MinTimeout %v above MaxTimeout %v", cfg.MinTimeout, cfg.MaxTimeout)
	}
	for i, a := range cfg.ECUs {
		if err := a.Validate(); err != nil {
			return nil, fmt.Errorf("obd: Config.ECUs[%d]: %w", i, err)
		}
		if a.Functional || a.Format != cfg.Format {
			return nil, fmt.Errorf("obd: Config.ECUs[%d] %v: must be a physical %v address", i, a, cfg.Format)
		}
	}
	p := &Poller{cfg: cfg}
	p.sc = schedConfig{initialTimeout: cfg.InitialTimeout, minTimeout: cfg.MinTimeout, maxTimeout: cfg.MaxTimeout,
		pendingTimeout: cfg.PendingTimeout, priorityStep: cfg.PriorityStep, maxBackoff: cfg.MaxBackoff,
		noMulti: cfg.SinglePID, wanted: make([]bool, NumStandardChannels()), emit: cfg.Emit}
	byPID := map[PID]int{}
	for i, c := range cfg.Channels {
		ch, pid, ok := LookupChannel(c.Name)
		if !ok {
			return nil, fmt.Errorf("obd: Config.Channels[%d]: unknown channel %q", i, c.Name)
		}
		if c.Interval <= 0 || c.Priority < 0 || c.Priority > MaxPriority {
			return nil, fmt.Errorf("obd: Config.Channels[%d] %q: need Interval > 0 and Priority 0–%d", i, c.Name, MaxPriority)
		}
		p.sc.wanted[ch] = true
		if j, ok := byPID[pid]; ok { // one item per PID: fastest rate, highest priority
			p.items[j].interval = min(p.items[j].interval, c.Interval)
			p.items[j].prio = max(p.items[j].prio, c.Priority)
			continue
		}
		byPID[pid] = len(p.items)
		p.items = append(p.items, item{kind: pidItem, pid: pid, interval: c.Interval, prio: c.Priority})
	}
	for i, s := range cfg.Signals {
		if err := s.Validate(); err != nil {
			return nil, fmt.Errorf("obd: Config.Signals[%d]: %w", i, err)
		}
		if s.Interval <= 0 || s.Priority < 0 || s.Priority > MaxPriority {
			return nil, fmt.Errorf("obd: Config.Signals[%d] %q: need Interval > 0 and Priority 0–%d", i, s.Name, MaxPriority)
		}
		if _, _, dup := LookupChannel(s.Name); dup {
			return nil, fmt.Errorf("obd: Config.Signals[%d]: name %q is a standard channel", i, s.Name)
		}
		p.sc.signals = append(p.sc.signals, s.Signal)
		p.items = append(p.items, item{kind: sigItem, sig: i, interval: s.Interval, prio: s.Priority})
	}
	if len(p.items) == 0 {
		return nil, errors.New("obd: nothing to poll: no Channels or Signals")
	}
	return p, nil
}

// Channels returns the definitions of every channel the Poller can emit,
// indexed by ChannelIndex: the standard table, then Config.Signals in order.
func (p *Poller) Channels() []pipeline.Channel {
	n := int(NumStandardChannels())
	out := make([]pipeline.Channel, n, n+len(p.sc.signals))
	for i := range out {
		out[i], _, _ = StandardChannel(ChannelIndex(i))
	}
	for _, s := range p.sc.signals {
		out = append(out, pipeline.Channel{Name: s.Name, Quantity: s.Quantity, Unit: s.Unit, Source: "obd"})
	}
	return out
}

// ECUStats are the counters of one ECU.
type ECUStats struct {
	Addr         Addr
	Requests     uint64        // requests sent
	Responses    uint64        // positive responses matched to a request
	Timeouts     uint64        // requests that got no final answer in time
	NRCs         uint64        // negative responses other than 0x78
	PendingNRCs  uint64        // NRC 0x78 (response pending) seen
	Malformed    uint64        // payloads that failed to parse or decode
	Unsolicited  uint64        // messages matching no outstanding request
	SendErrors   uint64        // Transport.Send failures
	ResponseTime time.Duration // smoothed response time (EWMA), 0 until measured
	Timeout      time.Duration // current adaptive timeout
	MultiPID     MultiPID      // learned multi-PID support
}

// Stats are the Poller's counters; totals sum the per-ECU counters.
type Stats struct {
	Requests, Responses, Timeouts, NRCs uint64
	DiscoveryRounds                     uint64 // functional discovery requests sent
	ReceiveErrors                       uint64 // Transport.Receive failures
	Dropped                             uint64 // messages dropped: unknown sender or worker backlog
	ECUs                                []ECUStats
}

// Stats returns a snapshot of the counters. It is safe to call while Run runs.
func (p *Poller) Stats() Stats {
	p.mu.Lock()
	ecus := append([]*ecuSched(nil), p.ecus...)
	p.mu.Unlock()
	s := Stats{DiscoveryRounds: p.disc.rounds.Load(), ReceiveErrors: p.disc.receiveErrors.Load(),
		Dropped: p.disc.dropped.Load() + p.disc.unsolicited.Load()}
	for _, e := range ecus {
		c := &e.c
		es := ECUStats{Addr: e.addr, Requests: c.requests.Load(), Responses: c.responses.Load(), Timeouts: c.timeouts.Load(),
			NRCs: c.nrcs.Load(), PendingNRCs: c.pendingNRCs.Load(), Malformed: c.malformed.Load(), Unsolicited: c.unsolicited.Load(),
			SendErrors: c.sendErrors.Load(), ResponseTime: time.Duration(c.srtt.Load()), Timeout: time.Duration(c.rto.Load()),
			MultiPID: MultiPID(c.multi.Load())}
		s.Requests += es.Requests
		s.Responses += es.Responses
		s.Timeouts += es.Timeouts
		s.NRCs += es.NRCs
		s.ECUs = append(s.ECUs, es)
	}
	return s
}

// Run discovers the ECUs (unless Config.ECUs names them) and polls them
// until ctx is cancelled; it then returns ctx.Err(). Transport errors are
// counted and retried with backoff, never returned. Run may be called once.
func (p *Poller) Run(ctx context.Context) error {
	if p.ran.Swap(true) {
		return errors.New("obd: Poller.Run called twice")
	}
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	msgs := make(chan Message, 64)
	var wg sync.WaitGroup
	defer wg.Wait()
	wg.Add(1)
	go func() { defer wg.Done(); p.receive(ctx, msgs) }()

	found := map[Addr][]byte{}
	if len(p.cfg.ECUs) == 0 {
		var err error
		if found, err = p.discover(ctx, msgs); err != nil {
			return err
		}
	} else {
		for _, a := range p.cfg.ECUs {
			found[a] = nil
		}
	}
	addrs := make([]Addr, 0, len(found))
	for a := range found {
		addrs = append(addrs, a)
	}
	sort.Slice(addrs, func(i, j int) bool { return addrs[i].ECU < addrs[j].ECU })
	inbox := map[Addr]chan Message{}
	now := p.cfg.Clock.Now()
	for _, a := range addrs {
		e := newECUSched(a, &p.sc, p.items, now)
		if bm := found[a]; bm != nil {
			e.learnBitmap(0x00, bm)
		}
		p.mu.Lock()
		p.ecus = append(p.ecus, e)
		p.mu.Unlock()
		in := make(chan Message, 8)
		inbox[a] = in
		wg.Add(1)
		go func() { defer wg.Done(); p.work(ctx, e, in) }()
	}
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case m := <-msgs:
			in, ok := inbox[m.From]
			if !ok {
				p.disc.unsolicited.Add(1)
				continue
			}
			select {
			case in <- m:
			default:
				p.disc.dropped.Add(1)
			}
		}
	}
}

// receive pumps Transport.Receive into msgs, backing off on errors.
func (p *Poller) receive(ctx context.Context, msgs chan<- Message) {
	backoff := 10 * time.Millisecond
	for {
		m, err := p.cfg.Transport.Receive(ctx)
		if ctx.Err() != nil {
			return
		}
		if err != nil {
			p.disc.receiveErrors.Add(1)
			select {
			case <-ctx.Done():
				return
			case <-p.cfg.Clock.After(backoff):
			}
			backoff = min(2*backoff, time.Second)
			continue
		}
		backoff = 10 * time.Millisecond
		select {
		case msgs <- m:
		case <-ctx.Done():
			return
		}
	}
}

func (p *Poller) send(ctx context.Context, to Addr, r Request) error {
	p.sendMu.Lock()
	defer p.sendMu.Unlock()
	if err := p.cfg.Transport.Send(ctx, to, r); err != nil {
		return fmt.Errorf("obd: send %v to %v: %w", r, to, err)
	}
	return nil
}

// discover sends the functional PID 00 request and collects the ECUs that
// answer within the window, repeating with backoff until one does. It returns
// each responder's PID 00 bitmap.
func (p *Poller) discover(ctx context.Context, msgs <-chan Message) (map[Addr][]byte, error) {
	req, _ := CurrentData(0x00)
	backoff := p.cfg.DiscoveryWindow
	for {
		found := map[Addr][]byte{}
		p.disc.rounds.Add(1)
		err := p.send(ctx, FunctionalAddr(p.cfg.Format), req)
		window := p.cfg.Clock.After(p.cfg.DiscoveryWindow)
	collect:
		for err == nil {
			select {
			case <-ctx.Done():
				return nil, ctx.Err()
			case <-window:
				break collect
			case m := <-msgs:
				r, perr := ParseResponse(m.Payload)
				if perr != nil || r.Negative || r.Service != 0x01 || len(r.Data) != 5 || r.Data[0] != 0x00 ||
					m.From.Functional || m.From.Format != p.cfg.Format {
					p.disc.unsolicited.Add(1)
					continue
				}
				found[m.From] = append([]byte(nil), r.Data[1:]...)
			}
		}
		if len(found) > 0 {
			return found, nil
		}
		select { // nobody answered (ignition off?): try again later
		case <-ctx.Done():
			return nil, ctx.Err()
		case <-p.cfg.Clock.After(backoff):
		}
		backoff = min(2*backoff, p.cfg.MaxBackoff)
	}
}

// work is the loop of one ECU: one request outstanding at a time.
func (p *Poller) work(ctx context.Context, e *ecuSched, in <-chan Message) {
	clk := p.cfg.Clock
	for {
		now := clk.Now()
		req, wake, ok := e.next(now)
		if !ok {
			var tick <-chan time.Time
			if !wake.IsZero() {
				tick = clk.After(wake.Sub(now))
			}
			select {
			case <-ctx.Done():
				return
			case <-tick:
			case <-in:
				e.c.unsolicited.Add(1)
			}
			continue
		}
		if err := p.send(ctx, e.addr, req); err != nil {
			e.sendFailed(clk.Now())
			select {
			case <-ctx.Done():
				return
			case <-clk.After(e.cfg.minTimeout):
			}
			continue
		}
		e.sent(clk.Now())
		for e.busy {
			select {
			case <-ctx.Done():
				return
			case m := <-in:
				e.handle(clk.Now(), m.Payload)
			case <-clk.After(e.out.deadline.Sub(clk.Now())):
				if !clk.Now().Before(e.out.deadline) {
					e.timeout(clk.Now())
				}
			}
		}
	}
}
