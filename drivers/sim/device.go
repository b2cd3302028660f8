package sim

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"github.com/creack/pty"

	"github.com/plenum-engine/plenum/drivers/serial"
)

// DeviceConfig sets up the simulated microcontroller.
type DeviceConfig struct {
	// Period is the real time between frames (default 10 ms: 100 Hz).
	Period time.Duration
	// TimeScale advances the engine model by Period × TimeScale per frame
	// (default 1).
	TimeScale float64
	// Sensors are the analog inputs (default DemoSensors).
	Sensors []Sensor
}

// Device is the simulated microcontroller on a pseudo-terminal: it steps the
// engine model and writes frames of the line protocol into the master side,
// whose slave the real serial driver opens by a stable path, as it would a
// /dev/serial/by-id link.
type Device struct {
	cfg    DeviceConfig
	eng    *Shared
	master *os.File
	dir    string
	path   string
}

// OpenDevice opens the pseudo-terminal and the link to it. Close removes
// both.
func OpenDevice(eng *Shared, cfg DeviceConfig) (*Device, error) {
	if cfg.Period <= 0 {
		cfg.Period = 10 * time.Millisecond
	}
	if cfg.TimeScale <= 0 {
		cfg.TimeScale = 1
	}
	if cfg.Sensors == nil {
		cfg.Sensors = DemoSensors()
	}
	master, tty, err := pty.Open()
	if err != nil {
		return nil, fmt.Errorf("simulator: open pseudo-terminal: %w", err)
	}
	name := tty.Name()
	tty.Close()
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
	return &Device{cfg: cfg, eng: eng, master: master, dir: dir, path: path}, nil
}

// Path is where the serial driver finds the device.
func (d *Device) Path() string { return d.path }

// Close closes the pseudo-terminal and removes the link.
func (d *Device) Close() error {
	err := d.master.Close()
	os.RemoveAll(d.dir)
	return err
}

// Run writes a frame every Period of real time until ctx ends, each
// advancing the model by Period × TimeScale; the device's millisecond
// counter runs in real time.
func (d *Device) Run(ctx context.Context) error {
	tick := time.NewTicker(d.cfg.Period)
	defer tick.Stop()
	var lines Lines
	lines.Sensors = d.cfg.Sensors
	start := time.Now()
	step := time.Duration(float64(d.cfg.Period) * d.cfg.TimeScale)
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-tick.C:
		}
		buf := lines.Next(d.eng.Step(step), uint32(time.Since(start)/time.Millisecond))
		if _, err := d.master.Write(buf); err != nil {
			return fmt.Errorf("simulator: write pty: %w", err)
		}
	}
}

// Lines encodes the microcontroller's frames: one line of the line protocol
// per engine state, with consecutive sequence numbers. The zero value with
// Sensors set is ready; not safe for concurrent use.
type Lines struct {
	Sensors  []Sensor
	seq      uint32
	readings []serial.Reading
	buf      []byte
}

// Next returns the line (with its newline) for st at device time ms. The
// slice is reused by the next call.
func (l *Lines) Next(st State, ms uint32) []byte {
	l.readings = l.readings[:0]
	for _, s := range l.Sensors {
		l.readings = append(l.readings, serial.NewReading(s.Field, s.Raw(st), !s.Counts))
	}
	l.seq++
	l.buf = serial.AppendFrame(l.buf[:0], l.seq, ms, l.readings)
	return l.buf
}

// Run steps the engine model on its own, with no simulated microcontroller
// (for a simulated ECU alone): every cfg.Period of real time it advances
// by Period × TimeScale, until ctx ends.
func (s *Shared) Run(ctx context.Context, cfg DeviceConfig) error {
	if cfg.Period <= 0 {
		cfg.Period = 10 * time.Millisecond
	}
	if cfg.TimeScale <= 0 {
		cfg.TimeScale = 1
	}
	tick := time.NewTicker(cfg.Period)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-tick.C:
			s.Step(time.Duration(float64(cfg.Period) * cfg.TimeScale))
		}
	}
}
