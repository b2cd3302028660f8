package main

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/serial"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline/promexport"
)

// source is one driver, built but not yet running: run feeds the pipeline
// it is handed until ctx ends; health, when set, reports at scrape time.
type source struct {
	name   string
	run    func(ctx context.Context, sink serial.Sink) error
	health promexport.Reporter
}

// buildSources registers the configured input channels and builds their
// drivers, appending what must be closed to d.closers. With open false
// (check) it opens nothing: no pseudo-terminal for the simulator, a virtual
// bus in place of SocketCAN. With a simulator section, the first serial
// source reads a pseudo-terminal that the simulated microcontroller writes.
func (d *daemon) buildSources(open bool) error {
	cfg := d.cfg
	var eng *sim.Shared
	var dc sim.DeviceConfig
	if cfg.Sim != nil {
		p := sim.DefaultParams()
		if cfg.Sim.Seed != 0 {
			p.Seed = cfg.Sim.Seed
		}
		eng = sim.NewShared(sim.NewEngine(p))
		dc.TimeScale = cfg.Sim.TimeScale
		if cfg.Sim.FrameRateHz > 0 {
			dc.Period = time.Duration(float64(time.Second) / cfg.Sim.FrameRateHz)
		}
	}
	for i, sc := range cfg.Serial {
		for j, in := range sc.Inputs {
			if _, err := sc.Sensor(in); err != nil {
				return cfg.At(fmt.Sprintf("the calibration does not work: %v", err), "serial", i, "inputs", j, "calibration")
			}
		}
		dec, h, err := sc.Decoder(i, d.reg)
		if err != nil {
			return cfg.At(err.Error(), "serial", i)
		}
		path := sc.Device
		if eng != nil && i == 0 && open {
			dev, err := sim.OpenDevice(eng, dc)
			if err != nil {
				return err
			}
			d.closers = append(d.closers, func() { dev.Close() })
			d.srcs = append(d.srcs, source{name: "simulator", run: func(ctx context.Context, _ serial.Sink) error { return dev.Run(ctx) }})
			path = dev.Path()
		}
		drv := serial.NewDriver(serial.Config{Name: sc.Name, Path: path, Baud: sc.Baud, Logger: d.log}, dec, h)
		d.srcs = append(d.srcs, source{name: sc.Name, run: drv.Run, health: drv})
	}
	if eng != nil && len(cfg.Serial) == 0 {
		// No simulated microcontroller to step the engine model: it runs on
		// its own, for the simulated ECU.
		d.srcs = append(d.srcs, source{name: "simulator", run: func(ctx context.Context, _ serial.Sink) error { return eng.Run(ctx, dc) }})
	}
	for i, cc := range cfg.CAN {
		bus, err := d.openBus(i, cc, eng, open)
		if err != nil {
			return err
		}
		src, err := obdcan.NewSource(bus, d.reg, cc.OBD())
		if err != nil {
			return cfg.At(err.Error(), "can", i)
		}
		d.srcs = append(d.srcs, source{name: cc.Name, health: src, run: func(ctx context.Context, sink serial.Sink) error {
			return src.Run(ctx, sink)
		}})
	}
	return nil
}

// openBus opens the bus of cfg.CAN[i], closed with the daemon: a "sim" bus
// is a virtual bus at the configured bit rate with a simulated ECU
// answering from eng; any other names a SocketCAN interface. With open
// false, a virtual bus that nothing else reads stands in for either.
func (d *daemon) openBus(i int, cc config.CAN, eng *sim.Shared, open bool) (can.Bus, error) {
	if cc.Bus == "sim" && eng == nil {
		return nil, d.cfg.At(`the simulated bus needs the simulated engine: add a simulator section (simulator: {}) or name a SocketCAN interface such as can0`, "can", i, "bus")
	}
	switch {
	case !open:
		vb, err := can.NewVirtualBus(can.VirtualConfig{BitRate: cc.BitRate})
		if err != nil {
			return nil, d.cfg.At(err.Error(), "can", i)
		}
		d.closers = append(d.closers, func() { vb.Close() })
		return vb.NewNode(), nil
	case cc.Bus == "sim":
		rig, err := sim.NewRig(context.Background(), sim.RigConfig{Bus: can.VirtualConfig{BitRate: cc.BitRate},
			ECU: sim.ECUConfig{Format: cc.OBD().Format, Source: eng.State, ResponseTime: 5 * time.Millisecond}})
		if err != nil {
			return nil, fmt.Errorf("can[%d]: simulated ECU: %w", i, err)
		}
		d.closers = append(d.closers, func() { rig.Close() })
		return rig.Node(), nil
	}
	b, err := can.DialSocketCAN(cc.Bus)
	if errors.Is(err, errors.ErrUnsupported) {
		return nil, fmt.Errorf("can[%d]: %s: this kernel has no SocketCAN: %w", i, cc.Bus, err)
	} else if err != nil {
		return nil, fmt.Errorf("can[%d]: %w", i, err)
	}
	d.closers = append(d.closers, func() { b.Close() })
	return b, nil
}
