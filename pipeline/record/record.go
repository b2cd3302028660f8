// Package record writes every accepted sample and every event of a run in
// InfluxDB line protocol, append-only, synced at an interval so that a power
// cut loses at most that window.
//
// Layout: <dir>/<run id>/run.json (the run's identity, written once at the
// start), <dir>/<run id>/0001.lp, 0002.lp, … (rotated by size), and, once the
// run closes normally, <dir>/<run id>/ended. A run directory without "ended"
// was cut short: Recover cuts a torn last line from its last file and adds
// "ended_abnormally". Data files of earlier runs are never rewritten.
//
// Points:
//
//	plenum,channel=<name>,run=<id>,source=<source>,vehicle=<v> value=<float>,quality="ok" <ns>
//	plenum_event,kind=<kind>,name=<name>,run=<id>,vehicle=<v> <field>=<float>,…,duration_seconds=<float> <start ns>
package record

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"sync/atomic"
	"time"

	"github.com/influxdata/line-protocol/v2/lineprotocol"

	"github.com/plenum-engine/plenum/pipeline"
)

// Config configures a Recorder.
type Config struct {
	Dir         string
	Run         string // run id; a directory name
	Vehicle     string
	Label       string
	Notes       string
	SyncEvery   time.Duration // default 200 ms
	ConfigYAML  []byte        // the configuration the run is made with, kept as config.yaml
	RotateBytes int64         // default 64 MiB
	Conditions  Conditions    // ambient conditions at the start, kept in run.json
	// Correction, when set, says how power was corrected in this run; kept
	// in run.json and the summary.
	Correction *Correction
	// Forward, when set, receives every block of whole lines as it is
	// written to the run's file, e.g. to push them to a time-series
	// database. It must copy and must not block.
	Forward Forwarder
}

// Forwarder takes whole lines of line protocol. Append copies them and
// returns at once; an error means they were not taken.
type Forwarder interface {
	Append(lines []byte) error
}

// Meta is the run's identity, in run.json.
type Meta struct {
	ID      string    `json:"id"`
	Vehicle string    `json:"vehicle"`
	Label   string    `json:"label,omitempty"`
	Notes   string    `json:"notes,omitempty"`
	Start   time.Time `json:"start"`
	// Conditions at the start: measured, entered, or absent.
	Conditions *Conditions `json:"conditions,omitempty"`
	// Correction says which standard corrected power and with which
	// entered conditions.
	Correction *Correction `json:"power_correction,omitempty"`
}

// Recorder appends points to the current file of one run. Write and
// WriteEvent buffer; Sync writes the buffer and fsyncs. Not safe for
// concurrent use: one goroutine (Run) owns it.
type Recorder struct {
	cfg    Config
	dir    string
	chans  []pipeline.Channel
	reg    *pipeline.Registry
	f      *os.File
	fileNo int
	size   int64
	enc    lineprotocol.Encoder
	points atomic.Uint64
	failed atomic.Uint64
	lost   atomic.Uint64 // encoded but dropped because the disk refused them
	prefix [][]byte      // escaped series key per channel
	sum    *summarizer
	roles  []role
	qtext  []string // ,quality="ok" and so on, with the space before the time
	werr   error    // a write that failed between syncs; Sync returns it
	fwdErr atomic.Uint64
}

// chunkBytes is how much Write buffers before handing it to the kernel (no
// fsync): a small buffer stays in the CPU cache; Sync makes it durable.
const chunkBytes = 256 << 10

// Open creates the run's directory and its first file.
func Open(cfg Config, reg *pipeline.Registry) (*Recorder, error) {
	if cfg.Run == "" || strings.ContainsAny(cfg.Run, `/\`) || cfg.Run == "." || cfg.Run == ".." {
		return nil, fmt.Errorf("record: run id %q is not a directory name", cfg.Run)
	}
	if cfg.SyncEvery <= 0 {
		cfg.SyncEvery = 200 * time.Millisecond
	}
	if cfg.RotateBytes <= 0 {
		cfg.RotateBytes = 64 << 20
	}
	dir := filepath.Join(cfg.Dir, cfg.Run)
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, fmt.Errorf("record: %w", err)
	}
	if _, err := os.Stat(filepath.Join(dir, "run.json")); err == nil {
		return nil, fmt.Errorf("record: run %s exists already; earlier runs are never written to", cfg.Run)
	}
	m := Meta{ID: cfg.Run, Vehicle: cfg.Vehicle, Label: cfg.Label, Notes: cfg.Notes, Start: time.Now().UTC()}
	if !cfg.Conditions.Empty() || cfg.Conditions.Note != "" {
		c := cfg.Conditions
		m.Conditions = &c
	}
	m.Correction = cfg.Correction
	meta, _ := json.MarshalIndent(m, "", "  ")
	if err := writeSynced(filepath.Join(dir, "run.json"), meta); err != nil {
		return nil, err
	}
	if len(cfg.ConfigYAML) > 0 {
		if err := writeSynced(filepath.Join(dir, "config.yaml"), cfg.ConfigYAML); err != nil {
			return nil, err
		}
	}
	r := newRecorder(cfg, reg)
	r.dir = dir
	if err := r.rotate(); err != nil {
		return nil, err
	}
	return r, nil
}

// NewEncoder returns a recorder without files: Write and WriteEvent encode
// into memory, and TakeBytes hands the encoded lines over. Replay uses it.
func NewEncoder(run, vehicle string, reg *pipeline.Registry) *Recorder {
	return newRecorder(Config{Run: run, Vehicle: vehicle}, reg)
}

// TakeBytes returns the lines encoded since the last call; the slice is
// valid until the next Write.
func (r *Recorder) TakeBytes() []byte {
	b := r.enc.Bytes()
	r.enc.Reset()
	return b
}

func newRecorder(cfg Config, reg *pipeline.Registry) *Recorder {
	r := &Recorder{cfg: cfg, reg: reg, chans: reg.Channels(), sum: newSummarizer(cfg.Run, cfg.Vehicle)}
	r.sum.s.Correction = cfg.Correction
	for q := pipeline.OK; q <= pipeline.SensorFault; q++ {
		r.qtext = append(r.qtext, `,quality="`+q.String()+`" `)
	}
	r.buildPrefixes()
	r.enc.SetPrecision(lineprotocol.Nanosecond)
	return r
}

func writeSynced(path string, b []byte) error {
	f, err := os.OpenFile(path, os.O_CREATE|os.O_EXCL|os.O_WRONLY, 0o644)
	if err != nil {
		return fmt.Errorf("record: %w", err)
	}
	if _, err := f.Write(b); err != nil {
		f.Close()
		return fmt.Errorf("record: %w", err)
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return fmt.Errorf("record: %w", err)
	}
	return f.Close()
}

func (r *Recorder) rotate() error {
	if r.f != nil {
		if err := r.f.Sync(); err != nil {
			return fmt.Errorf("record: sync: %w", err)
		}
		r.f.Close()
	}
	r.fileNo++
	name := filepath.Join(r.dir, fmt.Sprintf("%04d.lp", r.fileNo))
	f, err := os.OpenFile(name, os.O_CREATE|os.O_EXCL|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return fmt.Errorf("record: %w", err)
	}
	r.f, r.size = f, 0
	return nil
}

// Dir is the run's directory.
func (r *Recorder) Dir() string { return r.dir }

// Points returns how many points were encoded; Failed how many were refused
// by the encoder (NaN values are never written).
func (r *Recorder) Points() uint64 { return r.points.Load() }

// Failed returns how many points the encoder refused.
func (r *Recorder) Failed() uint64 { return r.failed.Load() }

// Lost returns how many encoded points were dropped because the disk kept
// refusing writes.
func (r *Recorder) Lost() uint64 { return r.lost.Load() }

// Write encodes one sample. The escaped series key of each channel
// (measurement and tags) is built once with the line-protocol encoder; the
// fields and time are appended to it the way the encoder writes them.
func (r *Recorder) Write(s pipeline.Sample) {
	if int(s.Channel) >= len(r.prefix) {
		r.chans = r.reg.Channels()
		if int(s.Channel) >= len(r.chans) {
			r.failed.Add(1)
			return
		}
		r.buildPrefixes()
	}
	if math.IsNaN(s.Value) || math.IsInf(s.Value, 0) {
		s.Value = 0 // the quality field says why; line protocol has no NaN
	}
	r.sum.sample(r.roles[s.Channel], s)
	b := r.enc.Bytes()
	b = append(b, r.prefix[s.Channel]...)
	b = append(b, " value="...)
	b = strconv.AppendFloat(b, s.Value, 'g', -1, 64)
	b = append(b, r.qtext[min(int(s.Quality), len(r.qtext)-1)]...)
	b = strconv.AppendInt(b, s.Time.UnixNano(), 10)
	b = append(b, '\n')
	r.enc.SetBuffer(b)
	r.points.Add(1)
	if len(b) >= chunkBytes && r.f != nil {
		r.flush()
		if r.werr != nil && len(r.enc.Bytes()) >= maxUnwritten {
			// The disk refuses: keep memory bounded and count what is lost.
			r.lost.Add(uint64(bytes.Count(r.enc.Bytes(), []byte{'\n'})))
			r.enc.Reset()
		}
	}
}

// maxUnwritten bounds what is held in memory while the disk refuses writes.
const maxUnwritten = 16 << 20

// flush hands the buffered lines to the kernel without syncing them.
func (r *Recorder) flush() {
	b := r.enc.Bytes()
	if len(b) == 0 || r.werr != nil {
		return
	}
	n, err := r.f.Write(b)
	r.size += int64(n)
	if err != nil {
		r.werr = fmt.Errorf("record: write: %w", err)
		return
	}
	if r.cfg.Forward != nil {
		if err := r.cfg.Forward.Append(b); err != nil {
			r.fwdErr.Add(1)
		}
	}
	r.enc.Reset()
}

// ForwardFailures returns how many blocks of lines Config.Forward refused.
func (r *Recorder) ForwardFailures() uint64 { return r.fwdErr.Load() }

// buildPrefixes encodes each channel's series key once.
func (r *Recorder) buildPrefixes() {
	var e lineprotocol.Encoder
	r.prefix = r.prefix[:0]
	r.roles = r.roles[:0]
	for _, c := range r.chans {
		r.roles = append(r.roles, roleOf(c.Name))
		e.Reset()
		e.StartLine("plenum")
		e.AddTag("channel", c.Name)
		e.AddTag("run", r.cfg.Run)
		e.AddTag("source", c.Source)
		e.AddTag("vehicle", r.cfg.Vehicle)
		e.AddField("x", lineprotocol.MustNewValue(int64(0)))
		e.EndLine(time.Unix(0, 0))
		line := e.Bytes()
		if err := e.Err(); err != nil {
			r.prefix = append(r.prefix, nil)
			continue
		}
		r.prefix = append(r.prefix, append([]byte(nil), line[:bytes.LastIndex(line, []byte(" x="))]...))
	}
}

// WriteEvent encodes one event.
func (r *Recorder) WriteEvent(e pipeline.Event) {
	r.sum.event(e)
	r.enc.StartLine("plenum_event")
	r.enc.AddTag("kind", e.Kind)
	if e.Name != "" {
		r.enc.AddTag("name", e.Name)
	}
	r.enc.AddTag("run", r.cfg.Run)
	r.enc.AddTag("vehicle", r.cfg.Vehicle)
	keys := make([]string, 0, len(e.Fields))
	for k, v := range e.Fields {
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			keys = append(keys, k)
		}
	}
	sort.Strings(keys)
	for _, k := range keys {
		r.enc.AddField(k, lineprotocol.MustNewValue(e.Fields[k]))
	}
	dur := 0.0
	if !e.End.IsZero() {
		dur = e.End.Sub(e.Start).Seconds()
	}
	r.enc.AddField("duration_seconds", lineprotocol.MustNewValue(dur))
	r.enc.EndLine(e.Start)
	r.check()
}

func (r *Recorder) check() {
	if err := r.enc.Err(); err != nil {
		r.failed.Add(1)
		r.enc.ClearErr()
		return
	}
	r.points.Add(1)
}

// Sync writes the buffered points and fsyncs the file, rotating when it has
// grown past the configured size.
func (r *Recorder) Sync() error {
	r.flush()
	if err := r.werr; err != nil {
		return err
	}
	if err := r.f.Sync(); err != nil {
		return fmt.Errorf("record: sync: %w", err)
	}
	if r.size >= r.cfg.RotateBytes {
		return r.rotate()
	}
	return nil
}

// ID returns the run id.
func (r *Recorder) ID() string { return r.cfg.Run }

// Summary returns the run's summary so far.
func (r *Recorder) Summary() Summary { return r.sum.summary() }

// Close syncs, writes summary.json beside the data and marks the run as
// ended normally.
func (r *Recorder) Close() error {
	if err := r.Sync(); err != nil {
		return err
	}
	if err := r.f.Close(); err != nil {
		return fmt.Errorf("record: %w", err)
	}
	if err := writeSynced(filepath.Join(r.dir, "summary.json"), r.sum.summary().JSON()); err != nil {
		return err
	}
	return writeSynced(filepath.Join(r.dir, "ended"), []byte(time.Now().UTC().Format(time.RFC3339Nano)+"\n"))
}

// Recovered says what Recover did to one run.
type Recovered struct {
	Run      string
	CutBytes int64 // torn tail removed from the last file
	Marked   bool  // ended_abnormally was added
}

// Recover finds runs in dir that were cut short, cuts a torn last line from
// each one's last file, and marks them as ended abnormally. Runs that ended
// normally are not touched.
func Recover(dir string) ([]Recovered, error) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, nil
		}
		return nil, fmt.Errorf("record: %w", err)
	}
	var out []Recovered
	for _, e := range ents {
		if !e.IsDir() {
			continue
		}
		rd := filepath.Join(dir, e.Name())
		if exists(filepath.Join(rd, "ended")) || exists(filepath.Join(rd, "ended_abnormally")) || !exists(filepath.Join(rd, "run.json")) {
			continue
		}
		files, _ := filepath.Glob(filepath.Join(rd, "*.lp"))
		sort.Strings(files)
		rec := Recovered{Run: e.Name()}
		if len(files) > 0 {
			cut, err := CutTornTail(files[len(files)-1])
			if err != nil {
				return out, err
			}
			rec.CutBytes = cut
		}
		if err := writeSynced(filepath.Join(rd, "ended_abnormally"), []byte("recovered "+time.Now().UTC().Format(time.RFC3339Nano)+"\n")); err != nil {
			return out, err
		}
		rec.Marked = true
		out = append(out, rec)
	}
	return out, nil
}

func exists(p string) bool {
	_, err := os.Stat(p)
	return err == nil
}

// CutTornTail truncates the file after its last newline and returns how many
// bytes it removed.
func CutTornTail(path string) (int64, error) {
	f, err := os.OpenFile(path, os.O_RDWR, 0)
	if err != nil {
		return 0, fmt.Errorf("record: %w", err)
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return 0, fmt.Errorf("record: %w", err)
	}
	size := st.Size()
	keep, err := lastNewline(f, size)
	if err != nil {
		return 0, fmt.Errorf("record: %s: %w", path, err)
	}
	if keep == size {
		return 0, nil
	}
	if err := f.Truncate(keep); err != nil {
		return 0, fmt.Errorf("record: %w", err)
	}
	return size - keep, f.Sync()
}

// lastNewline returns the length of the file up to and including its last
// newline (0 if there is none).
func lastNewline(f io.ReaderAt, size int64) (int64, error) {
	const chunk = 4096
	buf := make([]byte, chunk)
	for end := size; end > 0; {
		start := max(0, end-chunk)
		n, err := f.ReadAt(buf[:end-start], start)
		if err != nil && !errors.Is(err, io.EOF) {
			return 0, err
		}
		if i := bytes.LastIndexByte(buf[:n], '\n'); i >= 0 {
			return start + int64(i) + 1, nil
		}
		end = start
	}
	return 0, nil
}

// Run records everything sub delivers until ctx is done, syncing every
// SyncEvery, then closes the run. A failing disk is reported through the
// returned error; samples are never blocked on it (the subscription drops
// and counts what the recorder cannot take).
func (r *Recorder) Run(ctx context.Context, sub *pipeline.Subscription) error {
	tick := time.NewTicker(r.cfg.SyncEvery)
	defer tick.Stop()
	var buf []pipeline.Sample
	var evs []pipeline.Event
	drain := func() {
		buf, evs = sub.Drain(buf[:0], evs[:0])
		for _, s := range buf {
			r.Write(s)
		}
		for _, e := range evs {
			r.WriteEvent(e)
		}
	}
	for {
		select {
		case <-ctx.Done():
			drain()
			return r.Close()
		case <-sub.C():
			drain()
		case <-tick.C:
			if err := r.Sync(); err != nil {
				return err
			}
		}
	}
}
