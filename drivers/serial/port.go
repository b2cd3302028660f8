package serial

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"sync/atomic"
	"time"

	bugst "go.bug.st/serial"

	"github.com/plenum-engine/plenum/pipeline"
)

// Port is the part of a serial port the driver uses. A Read that times out
// returns (0, nil), as go.bug.st/serial does.
type Port interface {
	Read(p []byte) (int, error)
	Close() error
}

// Opener opens the device at path.
type Opener func(path string, baud int) (Port, error)

// readTimeout bounds one Read, so that a vanished device and a cancelled
// context are noticed within it.
const readTimeout = 100 * time.Millisecond

// OpenSerial opens a real serial port (or a pseudo-terminal) with
// go.bug.st/serial at baud, 8N1, with the driver's read timeout.
func OpenSerial(path string, baud int) (Port, error) {
	p, err := bugst.Open(path, &bugst.Mode{BaudRate: baud, DataBits: 8, Parity: bugst.NoParity, StopBits: bugst.OneStopBit})
	if err != nil {
		return nil, err
	}
	if err := p.SetReadTimeout(readTimeout); err != nil {
		p.Close()
		return nil, fmt.Errorf("set read timeout: %w", err)
	}
	return p, nil
}

// Config configures a Driver.
type Config struct {
	Name       string // source name, e.g. "bench_mcu"
	Path       string // device path; prefer /dev/serial/by-id/...
	Baud       int
	Open       Opener           // nil: OpenSerial
	Now        func() time.Time // nil: time.Now
	Logger     *slog.Logger
	MinBackoff time.Duration // default 100 ms
	MaxBackoff time.Duration // default 5 s
}

// Driver owns one serial device: it opens it, reads lines, decodes them and
// reopens the device with backoff when it vanishes.
type Driver struct {
	cfg     Config
	dec     *Decoder
	health  *pipeline.Health
	log     *slog.Logger
	reopens *atomic.Uint64
	readErr *atomic.Uint64
	burst   burstLog
}

// NewDriver returns a driver that feeds lines from cfg.Path through dec and
// reports into health.
func NewDriver(cfg Config, dec *Decoder, health *pipeline.Health) *Driver {
	if cfg.Open == nil {
		cfg.Open = OpenSerial
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.New(slog.DiscardHandler)
	}
	if cfg.MinBackoff <= 0 {
		cfg.MinBackoff = 100 * time.Millisecond
	}
	if cfg.MaxBackoff <= 0 {
		cfg.MaxBackoff = 5 * time.Second
	}
	log := cfg.Logger.With("source", cfg.Name, "device", cfg.Path)
	return &Driver{cfg: cfg, dec: dec, health: health, log: log,
		reopens: health.Counter("reopens"), readErr: health.Counter("read_errors"),
		burst: burstLog{log: log, every: 10 * time.Second}}
}

// Name returns the source name.
func (d *Driver) Name() string { return d.cfg.Name }

// Run reads until ctx is done. A missing or vanished device is retried with
// backoff; Run returns only ctx's error.
func (d *Driver) Run(ctx context.Context) error {
	backoff := d.cfg.MinBackoff
	opened := false
	for {
		p, err := d.cfg.Open(d.cfg.Path, d.cfg.Baud)
		if err != nil {
			d.health.SetUp(false)
			d.burst.warn(d.cfg.Now(), "open", "cannot open device; retrying", err)
		} else {
			if opened {
				d.reopens.Add(1)
			}
			opened = true
			d.log.Info("device open")
			d.dec.Reset()
			d.health.SetUp(true)
			backoff = d.cfg.MinBackoff
			err = d.read(ctx, p)
			p.Close()
			d.health.SetUp(false)
			if ctx.Err() != nil {
				return ctx.Err()
			}
			d.log.Warn("device vanished; reopening with backoff", "err", err)
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(backoff):
		}
		backoff = min(backoff*2, d.cfg.MaxBackoff)
	}
}

// read consumes lines until the port fails, the device node disappears, or
// ctx ends.
func (d *Driver) read(ctx context.Context, p Port) error {
	st0, statErr := os.Stat(d.cfg.Path)
	buf := make([]byte, 4096)
	line := make([]byte, 0, MaxLine)
	overlong := false
	idle := 0
	for {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		n, err := p.Read(buf)
		if err != nil {
			d.readErr.Add(1)
			return fmt.Errorf("read: %w", err)
		}
		if n == 0 {
			// A timeout. Check that the device node is still the one we opened:
			// a USB adapter that was pulled leaves no node, or a new one.
			idle++
			if statErr == nil {
				st, err := os.Stat(d.cfg.Path)
				if err != nil {
					return fmt.Errorf("device node gone: %w", err)
				}
				if !os.SameFile(st0, st) {
					return errors.New("device node replaced")
				}
			}
			if idle*int(readTimeout/time.Millisecond) >= 1000 {
				d.health.SetUp(false) // silent for a second: not delivering
			}
			continue
		}
		if idle > 0 {
			idle = 0
			d.health.SetUp(true)
		}
		now := d.cfg.Now()
		for _, c := range buf[:n] {
			if c == '\n' {
				if overlong {
					overlong = false
					d.dec.c.Overlong.Add(1)
					d.burst.warn(now, "overlong", "discarded an overlong line", nil)
				} else if err := d.dec.Line(line, now); err != nil {
					d.burst.warn(now, "line", "bad line", err)
				}
				line = line[:0]
				continue
			}
			if len(line) == MaxLine {
				overlong = true
				continue
			}
			if !overlong {
				line = append(line, c)
			}
		}
	}
}

// burstLog logs the first of a burst of like problems, then at most one
// summary per interval with the count suppressed.
type burstLog struct {
	log   *slog.Logger
	every time.Duration
	last  map[string]time.Time
	count map[string]int
}

func (b *burstLog) warn(now time.Time, kind, msg string, err error) {
	if b.last == nil {
		b.last, b.count = map[string]time.Time{}, map[string]int{}
	}
	t, seen := b.last[kind]
	if seen && now.Sub(t) < b.every {
		b.count[kind]++
		return
	}
	attrs := []any{"kind", kind}
	if err != nil {
		attrs = append(attrs, "err", err)
	}
	if n := b.count[kind]; n > 0 {
		attrs = append(attrs, "suppressed", n)
	}
	b.log.Warn(msg, attrs...)
	b.last[kind] = now
	b.count[kind] = 0
}
