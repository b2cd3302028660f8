package main

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/serial"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
)

// buildOBDSources registers the polled OBD channels and builds one source
// per CAN section, each on a bus of its own that closers close. A "sim" bus
// is a virtual bus at the configured bit rate with a simulated ECU
// answering from eng.
func buildOBDSources(cfg *config.Config, reg *pipeline.Registry, eng *sim.Shared) (out []source, closers []func(), err error) {
	defer func() {
		if err != nil {
			for _, c := range closers {
				c()
			}
		}
	}()
	for i, cc := range cfg.CAN {
		format := obd.ID11
		if cc.Format == "29bit" {
			format = obd.ID29
		}
		sc := cc.OBD()
		var (
			bus      can.Bus
			closeBus func()
		)
		if cc.Bus == "sim" {
			if eng == nil {
				return nil, closers, fmt.Errorf("can[%d]: bus sim needs the simulator section", i)
			}
			rig, err := sim.NewRig(context.Background(), sim.RigConfig{Bus: can.VirtualConfig{BitRate: cc.BitRate},
				ECU: sim.ECUConfig{Format: format, Source: eng.State, ResponseTime: 5 * time.Millisecond}})
			if err != nil {
				return nil, closers, fmt.Errorf("can[%d]: simulated ECU: %w", i, err)
			}
			bus, closeBus = rig.Node(), func() { rig.Close() }
		} else {
			b, err := can.DialSocketCAN(cc.Bus)
			if err != nil {
				if errors.Is(err, errors.ErrUnsupported) {
					return nil, closers, fmt.Errorf("can[%d]: %s: this kernel has no SocketCAN: %w", i, cc.Bus, err)
				}
				return nil, closers, fmt.Errorf("can[%d]: %w", i, err)
			}
			bus, closeBus = b, func() { b.Close() }
		}
		closers = append(closers, closeBus)
		src, err := obdcan.NewSource(bus, reg, sc)
		if err != nil {
			return nil, closers, fmt.Errorf("can[%d]: %w", i, err)
		}
		out = append(out, source{name: cc.Name, health: src, run: func(ctx context.Context, sink serial.Sink) error {
			return src.Run(ctx, sink)
		}})
	}
	return out, closers, nil
}
