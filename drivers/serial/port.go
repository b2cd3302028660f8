package serial

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"sync"
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
	Now        func() time.Time // nil: time.Now; stamps samples and paces logging
	Logger     *slog.Logger
	MinBackoff time.Duration // default 100 ms
	MaxBackoff time.Duration // default 5 s
	// UpTimeout is how long without a good frame before the source is
	// reported down; default 1 s.
	UpTimeout time.Duration
	// LogEvery is the burst interval of the rate-limited log: the first
	// problem of a kind is logged at once, repeats are summed and logged as
	// one summary per interval. Default 10 s.
	LogEvery time.Duration
}

// Driver owns one serial device: it opens it, reads lines, decodes them and
// reopens the device with backoff when it vanishes. Run must be called once;
// Up, Stats and Name are safe to call concurrently with it.
type Driver struct {
	cfg    Config
	dec    *Decoder
	health *pipeline.Health
	log    *slog.Logger
	c      Counters
	burst  burstLog
}

// NewDriver returns a driver that feeds lines from cfg.Path through dec and
// reports into health (nil: a private one).
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
	if cfg.MaxBackoff < cfg.MinBackoff {
		cfg.MaxBackoff = max(5*time.Second, cfg.MinBackoff)
	}
	if cfg.UpTimeout <= 0 {
		cfg.UpTimeout = time.Second
	}
	if cfg.LogEvery <= 0 {
		cfg.LogEvery = 10 * time.Second
	}
	if health == nil {
		health = pipeline.NewHealth("source", cfg.Name)
	}
	log := cfg.Logger.With("source", cfg.Name, "device", cfg.Path)
	return &Driver{cfg: cfg, dec: dec, health: health, log: log, c: dec.c,
		burst: burstLog{log: log, every: cfg.LogEvery}}
}

// Name returns the source name.
func (d *Driver) Name() string { return d.cfg.Name }

// Up reports whether the device is open and a good frame arrived within
// UpTimeout (measured on the host's monotonic clock).
func (d *Driver) Up() bool { return d.health.Up() }

// Stats returns a snapshot of the source's counters and Up.
func (d *Driver) Stats() Stats {
	s := d.c.Snapshot()
	s.Up = d.Up()
	return s
}

// Report gives the source's health: up, and the counters named in
// PROTOCOL.md.
func (d *Driver) Report() pipeline.HealthReport { return d.health.Report() }

// Run reads until ctx is done and hands every decoded line to sink as one
// frame. A missing or vanished device is retried with exponential backoff
// from MinBackoff to MaxBackoff (reset once a session delivers a frame); Run
// returns only ctx's error.
func (d *Driver) Run(ctx context.Context, sink Sink) error {
	backoff := d.cfg.MinBackoff
	opened := false
	for {
		p, err := d.cfg.Open(d.cfg.Path, d.cfg.Baud)
		if err != nil {
			d.health.SetUp(false)
			d.burst.warn(d.cfg.Now(), "open", "cannot open device; retrying", err)
		} else {
			if opened {
				d.c.Reopens.Add(1)
			}
			opened = true
			d.log.Info("device open")
			d.dec.Reset()
			delivered, err := d.session(ctx, p, sink)
			d.health.SetUp(false)
			if ctx.Err() != nil {
				return ctx.Err()
			}
			if delivered {
				backoff = d.cfg.MinBackoff
			}
			d.burst.warn(d.cfg.Now(), "vanished", "device vanished; reopening with backoff", err)
		}
		t := time.NewTimer(backoff)
		select {
		case <-ctx.Done():
			t.Stop()
			return ctx.Err()
		case <-t.C:
		}
		backoff = min(backoff*2, d.cfg.MaxBackoff)
	}
}

// session reads from an open port and closes it. Cancelling ctx closes the
// port, which ends a blocked Read.
func (d *Driver) session(ctx context.Context, p Port, sink Sink) (delivered bool, err error) {
	var once sync.Once
	closePort := func() { once.Do(func() { p.Close() }) }
	stop := context.AfterFunc(ctx, closePort)
	defer func() {
		stop()
		closePort()
	}()
	return d.read(ctx, p, sink)
}

// read consumes lines until the port fails, the device node disappears, or
// ctx ends. delivered says whether any good frame arrived.
func (d *Driver) read(ctx context.Context, p Port, sink Sink) (delivered bool, err error) {
	st0, statErr := os.Stat(d.cfg.Path)
	buf := make([]byte, 4096)
	line := make([]byte, 0, MaxLine)
	overlong := false
	frames := d.c.Frames.Load()
	// Health is judged on the host's monotonic clock, not the injected one
	// (which only stamps samples), so that a frozen test clock cannot keep
	// a dead source up.
	lastGood := time.Now()
	for {
		if ctx.Err() != nil {
			return delivered, ctx.Err()
		}
		n, err := p.Read(buf)
		now := d.cfg.Now()
		d.burst.flush(now)
		if err != nil {
			if ctx.Err() != nil {
				return delivered, ctx.Err()
			}
			d.c.ReadErrors.Add(1)
			return delivered, fmt.Errorf("read %s: %w", d.cfg.Path, err)
		}
		if n == 0 {
			// A timeout (go.bug.st/serial returns (0, nil)). Check that the
			// device node is still the one we opened: a USB adapter that was
			// pulled leaves no node, or later a new one.
			if statErr == nil {
				st, err := os.Stat(d.cfg.Path)
				if err != nil {
					return delivered, fmt.Errorf("device node gone: %w", err)
				}
				if !os.SameFile(st0, st) {
					return delivered, errors.New("device node replaced")
				}
			}
			if time.Since(lastGood) >= d.cfg.UpTimeout {
				d.health.SetUp(false)
			}
			continue
		}
		for _, c := range buf[:n] {
			if c == '\n' {
				if overlong {
					overlong = false
					d.c.Overlong.Add(1)
					d.burst.warn(now, "overlong", "discarded an overlong line", nil)
				} else if err := d.dec.Line(line, now, sink); err != nil {
					d.burst.warn(now, lineKind(err), "bad line", err)
				}
				line = line[:0]
				continue
			}
			if overlong {
				continue
			}
			if len(line) == MaxLine {
				overlong = true
				line = line[:0]
				continue
			}
			line = append(line, c)
		}
		if f := d.c.Frames.Load(); f != frames {
			frames, lastGood, delivered = f, time.Now(), true
			d.health.SetUp(true)
		} else if time.Since(lastGood) >= d.cfg.UpTimeout {
			d.health.SetUp(false) // bytes, but no good frame
		}
	}
}

// lineKind names the burst a line error belongs to, so that one kind of
// problem does not hide another in the log.
func lineKind(err error) string {
	var pe *ParseError
	if errors.As(err, &pe) {
		return pe.Kind.String()
	}
	if errors.Is(err, ErrUnknown) {
		return ErrUnknown.String()
	}
	return "line"
}

// burstLog logs the first problem of a kind at once, then sums repeats and
// logs one summary per interval (on the next problem or read after the
// interval). Used by the driver's goroutine only.
type burstLog struct {
	log   *slog.Logger
	every time.Duration
	kinds map[string]*burst
	next  time.Time // earliest time a summary may be due
}

type burst struct {
	since      time.Time
	msg        string
	suppressed int
	last       error
}

func (b *burstLog) warn(now time.Time, kind, msg string, err error) {
	if b.kinds == nil {
		b.kinds = map[string]*burst{}
	}
	if k := b.kinds[kind]; k != nil {
		if now.Sub(k.since) < b.every {
			k.suppressed++
			k.last = err
			return
		}
		b.summary(kind, k)
	}
	attrs := []any{"kind", kind}
	if err != nil {
		attrs = append(attrs, "err", err)
	}
	b.log.Warn(msg, attrs...)
	b.kinds[kind] = &burst{since: now, msg: msg}
	if b.next.IsZero() || now.Add(b.every).Before(b.next) {
		b.next = now.Add(b.every)
	}
}

// flush logs the summaries of bursts whose interval has passed and forgets
// them, so that the next problem of that kind is logged at once again.
func (b *burstLog) flush(now time.Time) {
	if len(b.kinds) == 0 || now.Before(b.next) {
		return
	}
	b.next = time.Time{}
	for kind, k := range b.kinds {
		if now.Sub(k.since) < b.every {
			if due := k.since.Add(b.every); b.next.IsZero() || due.Before(b.next) {
				b.next = due
			}
			continue
		}
		b.summary(kind, k)
		delete(b.kinds, kind)
	}
}

func (b *burstLog) summary(kind string, k *burst) {
	if k.suppressed == 0 {
		return
	}
	attrs := []any{"kind", kind, "repeats", k.suppressed, "interval", b.every}
	if k.last != nil {
		attrs = append(attrs, "last_err", k.last)
	}
	b.log.Warn(k.msg+" (repeated)", attrs...)
}
