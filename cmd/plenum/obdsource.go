package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/serial"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
)

// obdSource runs an obdcan.Source on the bus it owns.
type obdSource struct {
	*obdcan.Source
	sink    serial.Sink
	health  *pipeline.Health
	closers []func()
}

// Run polls until ctx is done, then closes the bus.
func (s *obdSource) Run(ctx context.Context) error {
	defer func() {
		for _, c := range s.closers {
			c()
		}
	}()
	// TODO(lead): once promexport.New takes Reporters, hand it s.Source and
	// delete this copy into the HealthSet.
	stop := make(chan struct{})
	defer close(stop)
	go func() {
		t := time.NewTicker(250 * time.Millisecond)
		defer t.Stop()
		for {
			select {
			case <-stop:
				return
			case <-t.C:
				copyReport(s.health, s.Report())
			}
		}
	}()
	err := s.Source.Run(ctx, putEach{s.sink})
	copyReport(s.health, s.Report())
	return err
}

// copyReport mirrors r into h.
func copyReport(h *pipeline.Health, r pipeline.HealthReport) {
	h.SetUp(r.Up)
	for _, c := range r.Counters {
		h.Counter(c.Name).Store(c.Value)
	}
}

// putEach adapts a per-sample sink to obdcan.Sink.
// TODO(lead): pass the *pipeline.Pipeline (PutFrame) directly and delete this.
type putEach struct{ serial.Sink }

// PutFrame puts each sample; it reports whether all were accepted.
func (p putEach) PutFrame(ss []pipeline.Sample) bool {
	ok := true
	for _, s := range ss {
		ok = p.Put(s) && ok
	}
	return ok
}

// buildOBDSources registers the polled OBD channels and builds the sources.
// A "sim" bus gets a virtual bus at the configured bit rate with a simulated
// ECU answering from eng.
func buildOBDSources(cfg *config.Config, reg *pipeline.Registry, sink serial.Sink, health *pipeline.HealthSet, eng *sim.Shared, log *slog.Logger) ([]source, error) {
	var out []source
	for i, cc := range cfg.CAN {
		format := obd.ID11
		if cc.Format == "29bit" {
			format = obd.ID29
		}
		sc := obdcan.Config{Name: cc.Name, Format: format, SinglePID: cc.SinglePID}
		for _, ch := range cc.Channels {
			sc.Channels = append(sc.Channels, obdcan.Channel{Name: ch.Name, RateHz: ch.RateHz, Priority: ch.Priority})
		}
		var bus can.Bus
		var closers []func()
		if cc.Bus == "sim" {
			if eng == nil {
				return nil, fmt.Errorf("can[%d]: bus sim needs the simulator section", i)
			}
			rig, err := sim.NewRig(context.Background(), sim.RigConfig{Bus: can.VirtualConfig{BitRate: cc.BitRate},
				ECU: sim.ECUConfig{Format: format, Source: eng.State, ResponseTime: 5 * time.Millisecond}})
			if err != nil {
				return nil, fmt.Errorf("can[%d]: simulated ECU: %w", i, err)
			}
			bus = rig.Node()
			closers = append(closers, func() { rig.Close() })
		} else {
			b, err := can.DialSocketCAN(cc.Bus)
			if err != nil {
				if errors.Is(err, errors.ErrUnsupported) {
					return nil, fmt.Errorf("can[%d]: %s: this kernel has no SocketCAN: %w", i, cc.Bus, err)
				}
				return nil, fmt.Errorf("can[%d]: %w", i, err)
			}
			bus = b
			closers = append(closers, func() { b.Close() })
		}
		src, err := obdcan.NewSource(bus, reg, sc)
		if err != nil {
			for _, c := range closers {
				c()
			}
			return nil, fmt.Errorf("can[%d]: %w", i, err)
		}
		h := health.Source(cc.Name)
		copyReport(h, src.Report()) // down, counters at zero
		out = append(out, &obdSource{Source: src, sink: sink, health: h, closers: closers})
	}
	return out, nil
}
