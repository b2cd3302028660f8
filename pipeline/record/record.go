// Package record writes every accepted sample and every event of a run in
// InfluxDB line protocol, append-only, synced at an interval so that a power
// cut loses at most that window.
//
// Layout: <dir>/<run id>/run.json (the run's identity, written once at the
// start), <dir>/<run id>/0001.lp, 0002.lp, … (rotated by size), and, once the
// run closes normally, <dir>/<run id>/ended. A run directory without "ended"
// was cut short: Recover cuts a torn last line from its last file and adds
// "ended_abnormally". Data files of earlier runs are never rewritten; a
// closed data file may be compressed into <n>.lp.gz (see Compressor and
// CompressSegment), which every reader takes in its place (DataFiles).
//
// Points:
//
//	plenum,channel=<name>,run=<id>,source=<source>,vehicle=<v> value=<float>,quality="ok" <ns>
//	plenum_event,kind=<kind>,name=<name>,run=<id>,vehicle=<v> <field>=<float>,…,duration_seconds=<float> <start ns>
//
// A disk that refuses writes (full, or failing) does not end the recording:
// the recorder holds what it could not write (Config.HoldBytes), retries with
// backoff and resumes when the disk takes writes again. What it cannot hold
// is counted as lost, and once writing works again the gap is written into
// the run as a recording_gap event (start and end: the times of the first
// and last point lost; fields lost_samples, lost_events). A data file only
// ever holds whole lines: a write the disk took in part is cut back.
package record

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
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
	"github.com/plenum-engine/plenum/pipeline/durable"
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
	// Closed, when set, is called with the path of each data file once
	// the recorder has synced and closed it for good (at a rotation, and
	// the last one at Close), e.g. to compress it. It must not block.
	Closed func(path string)
	// Create creates a data file of the run; nil: os.OpenFile (append-only,
	// never an existing file). Tests inject a disk that refuses writes.
	Create func(path string) (File, error)
	// Now is the clock of the write retries; nil: time.Now.
	Now func() time.Time
	// HoldBytes bounds what is held in memory while the disk refuses
	// writes; beyond it points are lost. 0: DefaultHoldBytes.
	HoldBytes int
}

// DefaultHoldBytes is what a recorder holds while the disk refuses writes:
// some 30 s of the demo's channels at 100 frames/s (0.5 MB/s).
const DefaultHoldBytes = 16 << 20

// File is what the recorder writes a run's data into; *os.File is one.
type File interface {
	Write(b []byte) (int, error)
	// Truncate cuts the file back to size bytes: a write the disk took in
	// part is undone so that the file only ever holds whole lines.
	Truncate(size int64) error
	Sync() error
	Close() error
}

// ErrDataLost is wrapped by the error Close returns when points of the run
// never reached the disk.
var ErrDataLost = errors.New("record: data lost")

// Retry backoff while the disk refuses writes.
const (
	firstRetry = 100 * time.Millisecond
	maxRetry   = 2 * time.Second
)

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
	f      File
	path   string // of f
	fileNo int
	size   int64 // bytes of whole lines in the current file
	enc    lineprotocol.Encoder
	points atomic.Uint64
	failed atomic.Uint64
	prefix [][]byte // escaped series key per channel
	sum    *summarizer
	roles  []role
	qtext  []string // ,quality="ok" and so on, with the space before the time
	fwdErr atomic.Uint64

	// What is encoded but not yet written: the samples and events in enc,
	// and the blocks the disk refused, oldest first.
	encSamples, encEvents uint64
	held                  []block
	heldBytes             int
	kept                  summarizer // the summary of what reached the disk

	written     atomic.Uint64 // points that reached the run's files
	lostSamples atomic.Uint64 // samples that never reached the disk
	lostEvents  atomic.Uint64
	queueLost   atomic.Uint64 // part of lostSamples: dropped before the recorder (CountDropped)
	writeFails  atomic.Uint64 // writes and syncs the disk refused
	gaps        int

	// The outage in progress: the disk refuses writes.
	refusing atomic.Bool
	werr     error // the last refusal
	retryAt  time.Time
	backoff  time.Duration
	gap      Gap // what this outage lost so far
	resumed  []Gap
}

// block is a run of whole lines the disk refused, held for a retry, with
// the summary as it stands once the block is on disk.
type block struct {
	b               []byte
	samples, events uint64
	sum             summarizer
}

// Gap is one outage of the disk: from the first refused write (Since) to
// the first write that worked again (Until), by the recorder's clock, and
// the points it lost, whose times run from Start to End (zero when nothing
// was lost).
type Gap struct {
	Since, Until    time.Time
	Start, End      time.Time
	Samples, Events uint64
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
	if cfg.HoldBytes <= 0 {
		cfg.HoldBytes = DefaultHoldBytes
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
	if r.cfg.Now == nil {
		r.cfg.Now = time.Now
	}
	if r.cfg.Create == nil {
		r.cfg.Create = func(path string) (File, error) {
			return os.OpenFile(path, os.O_CREATE|os.O_EXCL|os.O_WRONLY|os.O_APPEND, 0o644)
		}
	}
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
	r.kept = *r.sum
	for q := pipeline.OK; q <= pipeline.SensorFault; q++ {
		r.qtext = append(r.qtext, `,quality="`+q.String()+`" `)
	}
	r.buildPrefixes()
	r.enc.SetPrecision(lineprotocol.Nanosecond)
	return r
}

// writeSynced writes or replaces a file of a run directory durably
// (pipeline/durable): after a power cut it is there whole, or as it was
// before.
func writeSynced(path string, b []byte) error {
	if err := durable.WriteFile(path, b, 0o644); err != nil {
		return fmt.Errorf("record: %w", err)
	}
	return nil
}

// rotate starts the next data file. The current one (synced by the caller)
// stays in use when the next cannot be created.
func (r *Recorder) rotate() error {
	name := filepath.Join(r.dir, fmt.Sprintf("%04d.lp", r.fileNo+1))
	f, err := r.cfg.Create(name)
	if err != nil {
		return fmt.Errorf("record: %w", err)
	}
	if r.f != nil {
		r.f.Close()
		if r.cfg.Closed != nil {
			r.cfg.Closed(r.path)
		}
	}
	r.fileNo++
	r.f, r.size, r.path = f, 0, name
	return nil
}

// Dir is the run's directory.
func (r *Recorder) Dir() string { return r.dir }

// Points returns how many points (samples and events) were encoded for the
// run's files; Written how many of them reached the files.
func (r *Recorder) Points() uint64 { return r.points.Load() }

// Written returns how many points reached the run's files (handed to the
// kernel).
func (r *Recorder) Written() uint64 { return r.written.Load() }

// Failed returns how many points the encoder refused.
func (r *Recorder) Failed() uint64 { return r.failed.Load() }

// Lost returns how many samples of the run never reached the disk: refused
// while the disk refused writes and nothing more could be held, held but
// never written by the close, or counted by CountDropped.
func (r *Recorder) Lost() uint64 { return r.lostSamples.Load() }

// LostEvents returns how many events of the run never reached the disk.
func (r *Recorder) LostEvents() uint64 { return r.lostEvents.Load() }

// DiskLost returns the part of Lost the disk refused (Lost without what
// CountDropped counted).
func (r *Recorder) DiskLost() uint64 { return r.lostSamples.Load() - r.queueLost.Load() }

// CountDropped counts n samples of the run that were dropped before they
// reached the recorder (its queue was full): they are part of Lost and of
// the summary's samples_lost.
func (r *Recorder) CountDropped(n uint64) {
	r.queueLost.Add(n)
	r.lostSamples.Add(n)
}

// WriteFailures returns how many writes and syncs the disk refused.
func (r *Recorder) WriteFailures() uint64 { return r.writeFails.Load() }

// Refusing reports whether the disk refuses writes now: from the first
// refused write until a write and a sync work again. Safe for concurrent
// use.
func (r *Recorder) Refusing() bool { return r.refusing.Load() }

// HoldBytes returns how many bytes it holds at most while the disk refuses.
func (r *Recorder) HoldBytes() int { return r.cfg.HoldBytes }

// Unwritten returns how many bytes are encoded but not yet written.
func (r *Recorder) Unwritten() int { return r.heldBytes + len(r.enc.Bytes()) }

// TakeResumed returns the outages that ended since the last call.
func (r *Recorder) TakeResumed() []Gap {
	g := r.resumed
	r.resumed = nil
	return g
}

// full reports whether nothing more can be held while the disk refuses.
func (r *Recorder) full() bool {
	return r.f != nil && r.refusing.Load() && r.heldBytes+len(r.enc.Bytes()) >= r.cfg.HoldBytes
}

// refuse counts a point that cannot be held while the disk refuses.
func (r *Recorder) refuse(t time.Time, sample bool) {
	if sample {
		r.lostSamples.Add(1)
		r.gap.Samples++
	} else {
		r.lostEvents.Add(1)
		r.gap.Events++
	}
	if r.gap.Start.IsZero() || t.Before(r.gap.Start) {
		r.gap.Start = t
	}
	if t.After(r.gap.End) {
		r.gap.End = t
	}
}

// Write encodes one sample. The escaped series key of each channel
// (measurement and tags) is built once with the line-protocol encoder; the
// fields and time are appended to it the way the encoder writes them.
func (r *Recorder) Write(s pipeline.Sample) {
	if r.full() {
		r.refuse(s.Time, true)
		return
	}
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
	r.encSamples++
	if len(b) >= chunkBytes && r.f != nil {
		r.flush(false)
	}
}

// flush hands the held blocks and the buffered lines to the kernel without
// syncing them. While the disk refuses, it tries only when the retry is due
// (or when now is set), and holds a full buffer as a block.
func (r *Recorder) flush(now bool) {
	if r.f == nil {
		return
	}
	if r.refusing.Load() && !now && r.cfg.Now().Before(r.retryAt) {
		r.hold(chunkBytes)
		return
	}
	for len(r.held) > 0 {
		if !r.writeBlock(&r.held[0]) {
			r.hold(chunkBytes)
			return
		}
		r.heldBytes -= len(r.held[0].b)
		r.held[0] = block{}
		r.held = r.held[1:]
	}
	if len(r.enc.Bytes()) == 0 {
		return
	}
	b := block{b: r.enc.Bytes(), samples: r.encSamples, events: r.encEvents, sum: *r.sum}
	if r.writeBlock(&b) {
		r.enc.Reset()
		r.encSamples, r.encEvents = 0, 0
		return
	}
	r.hold(0)
}

// hold moves the buffered lines into a held block once they are at least
// atLeast bytes long.
func (r *Recorder) hold(atLeast int) {
	b := r.enc.Bytes()
	if len(b) == 0 || len(b) < atLeast {
		return
	}
	r.held = append(r.held, block{b: b, samples: r.encSamples, events: r.encEvents, sum: *r.sum})
	r.heldBytes += len(b)
	r.enc.SetBuffer(nil) // the block owns the bytes now
	r.encSamples, r.encEvents = 0, 0
}

// writeBlock writes one block; a write the disk refuses, even in part, is
// cut back and starts (or continues) an outage.
func (r *Recorder) writeBlock(b *block) bool {
	n, err := r.f.Write(b.b)
	if err != nil {
		if n > 0 {
			if terr := r.f.Truncate(r.size); terr != nil {
				err = errors.Join(err, fmt.Errorf("cutting back a part-written block: %w", terr))
			}
		}
		r.fail(fmt.Errorf("record: write: %w", err))
		return false
	}
	r.size += int64(n)
	r.written.Add(b.samples + b.events)
	r.kept = b.sum
	if r.cfg.Forward != nil {
		if err := r.cfg.Forward.Append(b.b); err != nil {
			r.fwdErr.Add(1)
		}
	}
	return true
}

// fail starts or continues an outage and schedules the next retry.
func (r *Recorder) fail(err error) {
	now := r.cfg.Now()
	r.writeFails.Add(1)
	r.werr = err
	if !r.refusing.Load() {
		r.refusing.Store(true)
		r.backoff = firstRetry
		r.gap = Gap{Since: now}
	} else {
		r.backoff = min(2*r.backoff, maxRetry)
	}
	r.retryAt = now.Add(r.backoff)
}

// resume ends the outage: the gap, when it lost anything, is written into
// the run as a recording_gap event.
func (r *Recorder) resume() {
	r.refusing.Store(false)
	r.werr = nil
	g := r.gap
	g.Until = r.cfg.Now()
	r.gap = Gap{}
	r.resumed = append(r.resumed, g)
	if g.Samples+g.Events == 0 {
		return
	}
	r.gaps++
	r.WriteEvent(pipeline.Event{Kind: "recording_gap", Name: "disk", Start: g.Start, End: g.End,
		Fields: map[string]float64{"lost_samples": float64(g.Samples), "lost_events": float64(g.Events),
			"refused_seconds": g.Until.Sub(g.Since).Seconds()}})
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
	if r.full() {
		r.refuse(e.Start, false)
		return
	}
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
	r.encEvents++
}

// Sync writes the buffered points and fsyncs the file, rotating when it has
// grown past the configured size. While the disk refuses writes it returns
// the last refusal, retrying only when the retry is due; the first sync that
// works again ends the outage. A file that cannot be rotated stays in use.
func (r *Recorder) Sync() error {
	return r.sync(false)
}

func (r *Recorder) sync(now bool) error {
	if r.f == nil {
		return nil
	}
	r.flush(now)
	if r.refusing.Load() && (len(r.held) > 0 || (!now && r.cfg.Now().Before(r.retryAt))) {
		return r.werr
	}
	if err := r.f.Sync(); err != nil {
		r.fail(fmt.Errorf("record: sync: %w", err))
		return r.werr
	}
	if r.refusing.Load() {
		r.resume()
	}
	if r.size >= r.cfg.RotateBytes {
		return r.rotate()
	}
	return nil
}

// ID returns the run id.
func (r *Recorder) ID() string { return r.cfg.Run }

// Summary returns the run's summary so far: of what reached the disk, for a
// recorder with files (with the samples and events lost), of everything
// encoded for one without (NewEncoder).
func (r *Recorder) Summary() Summary {
	if r.f == nil {
		return r.sum.summary()
	}
	s := r.kept.summary()
	s.SamplesLost = r.lostSamples.Load()
	s.EventsLost = r.lostEvents.Load()
	s.Gaps = r.gaps
	return s
}

// Close writes what it holds (retrying once at once), syncs, writes
// summary.json beside the data and marks the run as ended normally. What
// the disk still refuses is lost; the error then wraps ErrDataLost, as it
// does whenever points of the run were lost. A run whose summary or end
// marker cannot be written is left for Recover.
func (r *Recorder) Close() error {
	var errs []error
	if err := r.sync(true); err != nil {
		errs = append(errs, err)
	}
	if r.refusing.Load() {
		// Still refused: what is held is lost.
		for _, b := range r.held {
			r.lostSamples.Add(b.samples)
			r.lostEvents.Add(b.events)
		}
		r.lostSamples.Add(r.encSamples)
		r.lostEvents.Add(r.encEvents)
		r.held, r.heldBytes, r.encSamples, r.encEvents = nil, 0, 0, 0
		r.enc.Reset()
	}
	if err := r.f.Close(); err != nil {
		errs = append(errs, fmt.Errorf("record: %w", err))
	}
	sum := r.Summary()
	defer func() {
		if r.cfg.Closed != nil {
			r.cfg.Closed(r.path) // after the end marker: the run's files are final
		}
	}()
	if err := writeSynced(filepath.Join(r.dir, "summary.json"), sum.JSON()); err != nil {
		errs = append(errs, err)
	} else if err := writeSynced(filepath.Join(r.dir, "ended"), []byte(time.Now().UTC().Format(time.RFC3339Nano)+"\n")); err != nil {
		errs = append(errs, err)
	}
	if sum.SamplesLost > 0 || sum.EventsLost > 0 {
		errs = append(errs, fmt.Errorf("%w: run %s: %d samples and %d events lost, %d samples written",
			ErrDataLost, r.cfg.Run, sum.SamplesLost, sum.EventsLost, sum.Samples))
	}
	return errors.Join(errs...)
}

// RecoverAtStart is the recovery a daemon runs on dir before it records:
// it finishes the compressions cut short (RecoverCompression), then cuts
// the torn tails of runs cut short and marks them ended_abnormally
// (Recover). Each thing done is logged as a warning, and so are the
// errors, which do not stop the start (a nil log discards them); cutShort
// (when set) is called with every run cut short, e.g. to push it once its
// lines are acknowledged.
func RecoverAtStart(dir string, log *slog.Logger, cutShort func(run string)) {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	fixedGz, err := RecoverCompression(dir)
	if err != nil {
		log.Warn("recovering compressions cut short", "err", err)
	}
	for _, f := range fixedGz {
		log.Warn("a compression was cut short; finished", "file", f.Path, "action", f.Action)
	}
	fixed, err := Recover(dir)
	if err != nil {
		log.Warn("recovering earlier runs", "err", err)
		return
	}
	for _, f := range fixed {
		log.Warn("a run was cut short; its torn tail was cut and it is marked ended_abnormally", "run", f.Run, "cut_bytes", f.CutBytes)
		if cutShort != nil {
			cutShort(f.Run)
		}
	}
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
// SyncEvery, then closes the run and returns what Close returns. A disk
// that refuses writes does not end it (see the package doc); samples are
// never blocked on it (the subscription drops and counts what the recorder
// cannot take).
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
			r.Sync() // a refusal is retried; Refusing and Lost tell
		}
	}
}
