package main

import (
	"context"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"time"

	"github.com/creack/pty"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/calib"
	"github.com/plenum-engine/plenum/drivers/serial"
	"github.com/plenum-engine/plenum/drivers/sim"
	"github.com/plenum-engine/plenum/pipeline"
)

// buildSources registers the configured input channels and builds their
// drivers. With a simulator section, the first serial source reads a
// pseudo-terminal that the simulated microcontroller writes.
func buildSources(ctx context.Context, cfg *config.Config, reg *pipeline.Registry, sink serial.Sink, health *pipeline.HealthSet, log *slog.Logger) ([]source, func(), error) {
	var srcs []source
	var cleanups []func()
	cleanup := func() {
		for i := len(cleanups) - 1; i >= 0; i-- {
			cleanups[i]()
		}
	}
	var eng *sim.Shared
	if cfg.Sim != nil {
		p := sim.DefaultParams()
		if cfg.Sim.Seed != 0 {
			p.Seed = cfg.Sim.Seed
		}
		eng = sim.NewShared(sim.NewEngine(p))
	}
	for i, sc := range cfg.Serial {
		inputs := make([]serial.Input, 0, len(sc.Inputs))
		for j, in := range sc.Inputs {
			ch, _ := pipeline.Standard(in.Channel)
			ch.Source = sc.Name
			if in.MaxAge > 0 {
				ch.MaxAge = time.Duration(in.MaxAge)
			}
			id, err := reg.Register(ch)
			if err != nil {
				cleanup()
				return nil, nil, fmt.Errorf("serial[%d].inputs[%d]: %w", i, j, err)
			}
			sensor, err := sensorFor(sc, in, ch)
			if err != nil {
				cleanup()
				return nil, nil, fmt.Errorf("serial[%d].inputs[%d].calibration: %w", i, j, err)
			}
			inputs = append(inputs, serial.Input{Key: in.Field, Column: in.Column, Channel: id, Sensor: sensor})
		}
		h := health.Source(sc.Name)
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
		dec, err := serial.NewDecoder(format, sep, inputs, sink, serial.NewCounters(h))
		if err != nil {
			cleanup()
			return nil, nil, fmt.Errorf("serial[%d]: %w", i, err)
		}
		path := sc.Device
		if cfg.Sim != nil && i == 0 {
			dev, err := startSimDevice(cfg.Sim, eng, log)
			if err != nil {
				cleanup()
				return nil, nil, err
			}
			cleanups = append(cleanups, dev.close)
			srcs = append(srcs, dev)
			path = dev.path
		}
		srcs = append(srcs, serial.NewDriver(serial.Config{Name: sc.Name, Path: path, Baud: sc.Baud, Logger: log}, dec, h))
	}
	if eng != nil && len(cfg.Serial) == 0 {
		cleanup()
		return nil, nil, fmt.Errorf("simulator: needs a serial source to drive (the simulated microcontroller steps the engine)")
	}
	obds, err := buildOBDSources(cfg, reg, sink, health, eng, log)
	if err != nil {
		cleanup()
		return nil, nil, err
	}
	srcs = append(srcs, obds...)
	return srcs, cleanup, nil
}

func sensorFor(sc config.Serial, in config.SerialInput, ch pipeline.Channel) (calib.Sensor, error) {
	c := in.Calibration
	s := calib.Sensor{ADCMax: float64(int(1)<<sc.ADCBits - 1), RefMV: sc.ADCRefMV}
	if c.FaultBelow != nil {
		s.FaultBelowMV = *c.FaultBelow
	}
	if c.FaultAbove != nil {
		s.FaultAboveMV = *c.FaultAbove
	}
	conv := func(v float64) (float64, error) { return config.ToCanonical(c.Unit, ch.Unit, v) }
	div := calib.Divider{PullupOhm: 0, RefMV: sc.ADCRefMV}
	switch {
	case c.Linear != nil:
		o0, err := conv(c.Linear.Out[0])
		if err != nil {
			return s, err
		}
		o1, _ := conv(c.Linear.Out[1])
		s.Curve = calib.Linear{MV0: c.Linear.InMV[0], Out0: o0, MV1: c.Linear.InMV[1], Out1: o1}
	case c.Table != nil:
		out := make([]float64, len(c.Table.Out))
		for i, v := range c.Table.Out {
			var err error
			if out[i], err = conv(v); err != nil {
				return s, err
			}
		}
		t, err := calib.NewTable(c.Table.InMV, out)
		if err != nil {
			return s, err
		}
		s.Curve = t
	case c.NTCBeta != nil:
		div.PullupOhm = c.NTCBeta.PullupOhm
		s.Curve = calib.NTCBeta{Divider: div, R0Ohm: c.NTCBeta.R0Ohm, T0C: c.NTCBeta.T0C, Beta: c.NTCBeta.Beta}
	case c.NTCSH != nil:
		div.PullupOhm = c.NTCSH.PullupOhm
		s.Curve = calib.NTCSteinhartHart{Divider: div, A: c.NTCSH.A, B: c.NTCSH.B, C: c.NTCSH.C}
	}
	if c.Range != nil {
		lo, err := conv(c.Range[0])
		if err != nil {
			return s, err
		}
		hi, _ := conv(c.Range[1])
		s.Min, s.Max = lo, hi
	}
	return s, s.Validate()
}

// simDevice is the simulated microcontroller: it steps the engine model and
// writes frames of the line protocol into the master side of a pty whose
// slave the real serial driver opens by path.
type simDevice struct {
	path   string
	master *os.File
	dir    string
	eng    *sim.Shared
	sens   []sim.Sensor
	period time.Duration
	scale  float64
	log    *slog.Logger
}

func startSimDevice(sc *config.Simulator, eng *sim.Shared, log *slog.Logger) (*simDevice, error) {
	master, tty, err := pty.Open()
	if err != nil {
		return nil, fmt.Errorf("simulator: open pseudo-terminal: %w", err)
	}
	name := tty.Name()
	tty.Close()
	// A stable path, like /dev/serial/by-id, that points at the pty.
	dir, err := os.MkdirTemp("", "plenum-sim-")
	if err != nil {
		master.Close()
		return nil, fmt.Errorf("simulator: %w", err)
	}
	path := filepath.Join(dir, "usb-plenum-sim-mcu")
	if err := os.Symlink(name, path); err != nil {
		master.Close()
		os.RemoveAll(dir)
		return nil, fmt.Errorf("simulator: %w", err)
	}
	scale := sc.TimeScale
	if scale <= 0 {
		scale = 1
	}
	period := 10 * time.Millisecond
	if sc != nil && sc.FrameRateHz > 0 {
		period = time.Duration(float64(time.Second) / sc.FrameRateHz)
	}
	return &simDevice{path: path, master: master, dir: dir, eng: eng, sens: sim.DemoSensors(), scale: scale, log: log, period: period}, nil
}

func (d *simDevice) Name() string { return "simulator" }

func (d *simDevice) close() {
	d.master.Close()
	os.RemoveAll(d.dir)
}

// Run writes a frame every period of real time (10 ms: 100 Hz by default),
// each advancing the model by the period × the time scale; the device
// counter runs in real time.
func (d *simDevice) Run(ctx context.Context) error {
	period := d.period
	tick := time.NewTicker(period)
	defer tick.Stop()
	readings := make([]serial.Reading, len(d.sens))
	var buf []byte
	var seq uint32
	start := time.Now()
	step := time.Duration(float64(period) * d.scale)
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-tick.C:
		}
		st := d.eng.Step(step)
		for i, s := range d.sens {
			readings[i] = serial.NewReading(s.Field, s.Raw(st), !s.Counts)
		}
		seq++
		ms := uint32(time.Since(start) / time.Millisecond)
		buf = serial.AppendFrame(buf[:0], seq, ms, readings)
		if _, err := d.master.Write(buf); err != nil {
			return fmt.Errorf("simulator: write pty: %w", err)
		}
	}
}
