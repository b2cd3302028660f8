package obdcan

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/pipeline"
)

// Sink receives the readings of one OBD answer as one frame: every sample
// has the same time. The caller may reuse the slice once PutFrame returns.
type Sink interface {
	PutFrame([]pipeline.Sample) bool
}

// Registry gives each polled channel its pipeline.ChannelID
// (*pipeline.Registry is one).
type Registry interface {
	Register(pipeline.Channel) (pipeline.ChannelID, error)
}

// Channel is one standard OBD channel to poll.
type Channel struct {
	Name     string  // standard channel name, e.g. "ecu_engine_speed" (obd.LookupChannel)
	RateHz   float64 // target readings per second; > 0
	Priority int     // 0 (lowest) … obd.MaxPriority
}

// Config configures a Source. Only Name, Format and Channels are required.
type Config struct {
	// Name names the source: the health report's label and the Source of
	// every channel it registers.
	Name string
	// Format is the identifier format of the bus (obd.ID11 or obd.ID29).
	Format obd.Format
	// Channels are the standard channels to poll.
	Channels []Channel
	// SinglePID disables multi-PID service 01 requests from the start.
	SinglePID bool
	// Clock stamps the readings and judges whether the source is up
	// (default clock.System).
	Clock clock.Clock
}

// UpWindow is how recent the last reading must be for Report to say the
// source is up.
const UpWindow = time.Second

const noID = pipeline.ChannelID(1<<16 - 1)

// Source polls the ECUs on one CAN bus and hands each answer's readings to a
// Sink. Build it with NewSource; Run it once.
type Source struct {
	name      string
	clk       clock.Clock
	tr        *Transport
	poller    *obd.Poller
	ids       []pipeline.ChannelID // by obd.ChannelIndex; noID where not polled
	readings  atomic.Uint64
	last      atomic.Int64 // UnixNano of the last reading; 0: none yet
	running   atomic.Bool
	closeOnce sync.Once

	mu    sync.Mutex // serialises emit: ECUs answer concurrently
	sink  Sink
	frame []pipeline.Sample
}

// NewSource registers the channels of cfg in reg and prepares the poller on
// bus, which must not be read by anyone else. The Source does not close bus:
// the caller does, after Run has returned.
func NewSource(bus can.Bus, reg Registry, cfg Config) (*Source, error) {
	if reg == nil {
		return nil, errors.New("obdcan: registry is nil")
	}
	s := &Source{name: cfg.Name, clk: clock.Or(cfg.Clock), ids: make([]pipeline.ChannelID, obd.NumStandardChannels())}
	for k := range s.ids {
		s.ids[k] = noID
	}
	pcs := make([]obd.PollChannel, 0, len(cfg.Channels))
	for j, ch := range cfg.Channels {
		idx, _, ok := obd.LookupChannel(ch.Name)
		if !ok {
			return nil, fmt.Errorf("channels[%d]: unknown OBD channel %q", j, ch.Name)
		}
		if !(ch.RateHz > 0) {
			return nil, fmt.Errorf("channels[%d] %q: rate %v Hz, want > 0", j, ch.Name, ch.RateHz)
		}
		def, _, _ := obd.StandardChannel(idx)
		def.Source = cfg.Name
		def.Sensor = ch.Name
		def.MaxAge = max(time.Second, time.Duration(3*float64(time.Second)/ch.RateHz))
		id, err := reg.Register(def)
		if err != nil {
			return nil, fmt.Errorf("channels[%d]: %w", j, err)
		}
		s.ids[idx] = id
		pcs = append(pcs, obd.PollChannel{Name: ch.Name, Interval: time.Duration(float64(time.Second) / ch.RateHz), Priority: ch.Priority})
	}
	tr, err := New(bus, cfg.Format)
	if err != nil {
		return nil, err
	}
	p, err := obd.NewPoller(obd.Config{Transport: tr, Clock: s.clk, Format: cfg.Format, Channels: pcs, Emit: s.emit, SinglePID: cfg.SinglePID})
	if err != nil {
		tr.Close()
		return nil, err
	}
	s.tr, s.poller = tr, p
	return s, nil
}

// Name returns Config.Name.
func (s *Source) Name() string { return s.name }

// Run polls until ctx is done, handing each answer to sink, and then returns
// ctx.Err(). A failing bus is retried by the poller, never returned. Run
// closes the Source when it returns; it may be called once.
func (s *Source) Run(ctx context.Context, sink Sink) error {
	if sink == nil {
		return errors.New("obdcan: Source.Run: sink is nil")
	}
	defer s.Close()
	s.mu.Lock()
	s.sink = sink
	s.mu.Unlock()
	s.running.Store(true)
	err := s.poller.Run(ctx)
	s.running.Store(false)
	if ctx.Err() != nil {
		return ctx.Err()
	}
	return err
}

// Close stops the ISO-TP transport. Run calls it; call it yourself only for a
// Source that is never run. It does not close the bus.
func (s *Source) Close() error {
	var err error
	s.closeOnce.Do(func() { err = s.tr.Close() })
	return err
}

// Report returns the source's health, read at scrape time: up while Run runs
// and the last reading is less than UpWindow old by the Config's Clock, and
// the poller's counters.
func (s *Source) Report() pipeline.HealthReport {
	last := s.last.Load()
	up := s.running.Load() && last != 0 && s.clk.Now().Sub(time.Unix(0, last)) < UpWindow
	st := s.poller.Stats()
	tp := s.tr.Stats()
	return pipeline.HealthReport{Kind: "source", Name: s.name, Up: up, Counters: []pipeline.NamedCount{
		{Name: "negative_responses", Value: st.NRCs},
		{Name: "readings", Value: s.readings.Load()},
		{Name: "receive_errors", Value: st.ReceiveErrors},
		{Name: "requests", Value: st.Requests},
		{Name: "responses", Value: st.Responses},
		{Name: "timeouts", Value: st.Timeouts},
		// The ISO-TP layer's: receptions aborted or interrupted, completed
		// messages dropped, flow control frames ignored.
		{Name: "isotp_aborted_receptions", Value: tp.Aborted},
		{Name: "isotp_interrupted_receptions", Value: tp.Interrupted},
		{Name: "isotp_dropped_messages", Value: tp.Dropped},
		{Name: "isotp_unexpected_flow_controls", Value: tp.UnexpectedFC},
	}}
}

// emit is the poller's EmitFunc: one answer, one frame.
func (s *Source) emit(_ obd.Addr, t time.Time, rs []obd.Reading) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.frame = s.frame[:0]
	for _, r := range rs {
		if int(r.Channel) < len(s.ids) && s.ids[r.Channel] != noID {
			s.frame = append(s.frame, pipeline.Sample{Channel: s.ids[r.Channel], Value: r.Value, Time: t})
		}
	}
	if len(s.frame) == 0 || s.sink == nil {
		return
	}
	s.readings.Add(uint64(len(s.frame)))
	s.last.Store(t.UnixNano())
	s.sink.PutFrame(s.frame)
}
