package main

import (
	"context"
	"fmt"
	"log/slog"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/serial"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
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
// drivers. With a simulator section, the first serial source reads a
// pseudo-terminal that the simulated microcontroller writes. cleanup
// releases what the build opened.
func buildSources(cfg *config.Config, reg *pipeline.Registry, log *slog.Logger) (srcs []source, cleanup func(), err error) {
	var cleanups []func()
	cleanup = func() {
		for i := len(cleanups) - 1; i >= 0; i-- {
			cleanups[i]()
		}
	}
	defer func() {
		if err != nil {
			cleanup()
		}
	}()
	var eng *sim.Shared
	if cfg.Sim != nil {
		p := sim.DefaultParams()
		if cfg.Sim.Seed != 0 {
			p.Seed = cfg.Sim.Seed
		}
		eng = sim.NewShared(sim.NewEngine(p))
	}
	for i, sc := range cfg.Serial {
		dec, h, err := serialDecoder(i, sc, reg)
		if err != nil {
			return nil, nil, err
		}
		path := sc.Device
		if cfg.Sim != nil && i == 0 {
			dc := sim.DeviceConfig{TimeScale: cfg.Sim.TimeScale}
			if cfg.Sim.FrameRateHz > 0 {
				dc.Period = time.Duration(float64(time.Second) / cfg.Sim.FrameRateHz)
			}
			dev, err := sim.OpenDevice(eng, dc)
			if err != nil {
				return nil, nil, err
			}
			cleanups = append(cleanups, func() { dev.Close() })
			srcs = append(srcs, source{name: "simulator", run: func(ctx context.Context, _ serial.Sink) error { return dev.Run(ctx) }})
			path = dev.Path()
		}
		drv := serial.NewDriver(serial.Config{Name: sc.Name, Path: path, Baud: sc.Baud, Logger: log}, dec, h)
		srcs = append(srcs, source{name: sc.Name, run: drv.Run, health: drv})
	}
	if eng != nil && len(cfg.Serial) == 0 {
		// No simulated microcontroller to step the engine model: it runs on
		// its own, for the simulated ECU.
		srcs = append(srcs, source{name: "simulator", run: func(ctx context.Context, _ serial.Sink) error {
			return stepEngine(ctx, eng, cfg.Sim)
		}})
	}
	obds, closers, err := buildOBDSources(cfg, reg, eng)
	cleanups = append(cleanups, closers...)
	if err != nil {
		return nil, nil, err
	}
	return append(srcs, obds...), cleanup, nil
}

// serialDecoder registers the inputs of cfg.Serial[i] and builds its
// decoder, counting into the health it returns.
func serialDecoder(i int, sc config.Serial, reg *pipeline.Registry) (*serial.Decoder, *pipeline.Health, error) {
	inputs := make([]serial.Input, 0, len(sc.Inputs))
	for j, in := range sc.Inputs {
		ch, _ := pipeline.Standard(in.Channel)
		ch.Source = sc.Name
		if in.MaxAge > 0 {
			ch.MaxAge = time.Duration(in.MaxAge)
		}
		id, err := reg.Register(ch)
		if err != nil {
			return nil, nil, fmt.Errorf("serial[%d].inputs[%d]: %w", i, j, err)
		}
		sensor, err := sc.Sensor(in)
		if err != nil {
			return nil, nil, fmt.Errorf("serial[%d].inputs[%d].calibration: %w", i, j, err)
		}
		inputs = append(inputs, serial.Input{Key: in.Field, Column: in.Column, Channel: id, Sensor: sensor})
	}
	h := pipeline.NewHealth("source", sc.Name)
	format, sep := serial.Framed, byte(',')
	if sc.Format == "delimited" {
		format = serial.Delimited
		switch sc.Delimiter {
		case "tab":
			sep = '\t'
		case "space":
			sep = ' '
		case ";":
			sep = ';'
		}
	}
	dec, err := serial.NewDecoder(format, sep, inputs, serial.NewCounters(h))
	if err != nil {
		return nil, nil, fmt.Errorf("serial[%d]: %w", i, err)
	}
	return dec, h, nil
}

// stepEngine advances eng in real time (times the simulator's time scale)
// at its frame rate until ctx ends.
func stepEngine(ctx context.Context, eng *sim.Shared, sc *config.Simulator) error {
	period := 10 * time.Millisecond
	if sc.FrameRateHz > 0 {
		period = time.Duration(float64(time.Second) / sc.FrameRateHz)
	}
	scale := sc.TimeScale
	if scale <= 0 {
		scale = 1
	}
	tick := time.NewTicker(period)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-tick.C:
			eng.Step(time.Duration(float64(period) * scale))
		}
	}
}
