package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/serial"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
)

// obdSource polls an ECU over CAN and feeds the pipeline.
type obdSource struct {
	name    string
	bus     can.Bus
	tr      *obdcan.Transport
	poller  *obd.Poller
	ids     []pipeline.ChannelID // by obd.ChannelIndex; noID where not polled
	sink    serial.Sink          // given at Run
	health  *pipeline.Health
	reads   *atomic.Uint64
	lastAny atomic.Int64
	log     *slog.Logger
	closers []func()
}

const noID = pipeline.ChannelID(1<<16 - 1)

func (s *obdSource) Name() string { return s.name }

// Run polls until ctx is done. A failing bus is retried by the poller; Run
// also marks the source down after a second without readings.
func (s *obdSource) Run(ctx context.Context, sink serial.Sink) error {
	s.sink = sink
	defer func() {
		for _, c := range s.closers {
			c()
		}
	}()
	go func() {
		t := time.NewTicker(250 * time.Millisecond)
		defer t.Stop()
		for {
			select {
			case <-ctx.Done():
				return
			case <-t.C:
				s.health.SetUp(time.Since(time.Unix(0, s.lastAny.Load())) < time.Second)
				st := s.poller.Stats()
				s.health.Counter("requests").Store(st.Requests)
				s.health.Counter("responses").Store(st.Responses)
				s.health.Counter("timeouts").Store(st.Timeouts)
				s.health.Counter("negative_responses").Store(st.NRCs)
				s.health.Counter("receive_errors").Store(st.ReceiveErrors)
			}
		}
	}()
	err := s.poller.Run(ctx)
	s.health.SetUp(false)
	if ctx.Err() != nil {
		return ctx.Err()
	}
	return err
}

func (s *obdSource) emit(_ obd.Addr, ch obd.ChannelIndex, v float64, t time.Time) {
	if int(ch) >= len(s.ids) || s.ids[ch] == noID {
		return
	}
	s.reads.Add(1)
	s.lastAny.Store(time.Now().UnixNano())
	s.sink.PutFrame([]pipeline.Sample{{Channel: s.ids[ch], Value: v, Time: t}})
}

// buildOBDSources registers the polled OBD channels and builds the pollers.
// A "sim" bus gets a virtual bus at the configured bit rate with a simulated
// ECU answering from eng.
func buildOBDSources(cfg *config.Config, reg *pipeline.Registry, eng *sim.Shared, log *slog.Logger) ([]source, error) {
	var out []source
	for i, cc := range cfg.CAN {
		format := obd.ID11
		if cc.Format == "29bit" {
			format = obd.ID29
		}
		s := &obdSource{name: cc.Name, health: pipeline.NewHealth("source", cc.Name), log: log}
		s.reads = s.health.Counter("readings")
		var pcs []obd.PollChannel
		s.ids = make([]pipeline.ChannelID, obd.NumStandardChannels())
		for k := range s.ids {
			s.ids[k] = noID
		}
		for j, ch := range cc.Channels {
			idx, _, ok := obd.LookupChannel(ch.Name)
			if !ok {
				return nil, fmt.Errorf("can[%d].channels[%d]: unknown OBD channel %q", i, j, ch.Name)
			}
			def, _, _ := obd.StandardChannel(idx)
			def.Source = cc.Name
			def.Sensor = ch.Name
			def.MaxAge = max(time.Second, time.Duration(3*float64(time.Second)/ch.RateHz))
			id, err := reg.Register(def)
			if err != nil {
				return nil, fmt.Errorf("can[%d].channels[%d]: %w", i, j, err)
			}
			s.ids[idx] = id
			pcs = append(pcs, obd.PollChannel{Name: ch.Name, Interval: time.Duration(float64(time.Second) / ch.RateHz), Priority: ch.Priority})
		}
		if cc.Bus == "sim" {
			if eng == nil {
				return nil, fmt.Errorf("can[%d]: bus sim needs the simulator section", i)
			}
			vb, err := can.NewVirtualBus(can.VirtualConfig{BitRate: cc.BitRate})
			if err != nil {
				return nil, fmt.Errorf("can[%d]: %w", i, err)
			}
			ecu, err := sim.NewECU(vb.NewNode(), sim.ECUConfig{Format: format, Source: eng.State, ResponseTime: 5 * time.Millisecond})
			if err != nil {
				vb.Close()
				return nil, fmt.Errorf("can[%d]: simulated ECU: %w", i, err)
			}
			s.bus = vb.NewNode()
			s.closers = append(s.closers, func() { ecu.Close() }, func() { vb.Close() })
		} else {
			b, err := can.DialSocketCAN(cc.Bus)
			if err != nil {
				if errors.Is(err, errors.ErrUnsupported) {
					return nil, fmt.Errorf("can[%d]: %s: this kernel has no SocketCAN: %w", i, cc.Bus, err)
				}
				return nil, fmt.Errorf("can[%d]: %w", i, err)
			}
			s.bus = b
			s.closers = append(s.closers, func() { b.Close() })
		}
		tr, err := obdcan.New(s.bus, format)
		if err != nil {
			return nil, fmt.Errorf("can[%d]: %w", i, err)
		}
		s.tr = tr
		s.closers = append([]func(){func() { tr.Close() }}, s.closers...)
		p, err := obd.NewPoller(obd.Config{Transport: tr, Format: format, Channels: pcs, Emit: s.emit, SinglePID: cc.SinglePID})
		if err != nil {
			return nil, fmt.Errorf("can[%d]: %w", i, err)
		}
		s.poller = p
		out = append(out, source{name: s.name, run: s.Run, health: s.health})
	}
	return out, nil
}
