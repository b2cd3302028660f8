// Package backlog is a bounded on-disk queue of line-protocol lines that
// survives a restart: lines are appended to segment files, read back as
// batches (exact byte ranges cut at line boundaries) and acknowledged by
// moving a cursor. It knows nothing of the network; the sender that drains
// it decides when a batch is done with.
//
// # Layout
//
//	<Dir>/seg-<offset>.lp   segment files; <offset> is the 20-digit logical
//	                        byte offset of the segment's first byte in the
//	                        stream of all lines ever appended
//	<Dir>/cursor            "tsdbpush cursor v1 acked=<offset> crc=<crc32>\n":
//	                        every byte before <offset> is done with
//	<Dir>/rejected/<offset>.lp  batches set aside (SetAside)
//
// Segments are removed once fully acknowledged. The directory is bounded by
// MaxBytes (plus at most one line): when it is exceeded the oldest segment is
// removed even if unsent, and what it held unsent is counted and logged. On
// Open a torn last line (a crash in the middle of a write) is cut from every
// segment, so only whole lines are ever read back; lines before the cursor
// are not read back again.
//
// # Concurrency
//
// A Backlog has two sides that may run at the same time: the writer (Write,
// Sync, Close), and the reader (Next, Ack, SetAside). Each side is called
// from one goroutine at a time. Pending and Stats are safe at any time. One
// mutex guards the segment list and the offsets that both sides share; file
// I/O (writes, fsyncs, reads) happens outside it.
package backlog

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"sync/atomic"

	"github.com/plenum-engine/plenum/pipeline/durable"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// Config configures a Backlog. Dir is required; every other field has a
// useful zero value.
type Config struct {
	// Dir holds the segment files, the cursor and rejected/; created if
	// missing.
	Dir string
	// MaxBytes bounds the segment files on disk; default 256 MiB.
	MaxBytes int64
	// SegmentBytes is the size at which a new segment file is started;
	// default MaxBytes/8, at least 4 KiB and at most MaxBytes.
	SegmentBytes int64
	// Logger receives warnings; default slog.Default().
	Logger *slog.Logger
}

// Batch is an exact byte range [Start, End) of the backlog, made of whole
// lines.
type Batch struct {
	Start, End int64
	Data       []byte // the lines, End-Start bytes
	Lines      int    // number of lines in Data
}

// Dropped counts unsent data removed from the backlog.
type Dropped struct {
	Segments    uint64 // segments removed while holding unsent lines
	Lines       uint64
	Bytes       uint64
	LastSegment string // path of the last such segment, "" if none
	// From and To span the unsent bytes removed, [From, To) in logical
	// offsets (0, 0 when none).
	From, To int64
}

// Stats are a Backlog's counters since Open and its current size.
type Stats struct {
	// PendingBytes are bytes written but not yet acknowledged.
	PendingBytes int64
	// Segments is the number of segment files.
	Segments int
	// DroppedLines/DroppedBytes are lines lost unsent: oldest segments
	// removed to keep the bound, or a failed disk write.
	DroppedLines, DroppedBytes uint64
	// DroppedSegments are segments removed while holding unsent lines.
	DroppedSegments uint64
}

type segment struct {
	start, size int64
	path        string
}

func (s segment) end() int64 { return s.start + s.size }

// Backlog is an open backlog directory.
type Backlog struct {
	dir          string
	maxBytes     int64
	segmentBytes int64
	log          *slog.Logger

	// cur is the segment being written, the last of segs; the writer's own.
	cur *os.File

	// mu guards the state both sides share.
	mu      sync.Mutex
	segs    []segment
	acked   int64 // next byte to read; all before it done with
	next    int64 // logical offset of the next byte to write
	writing bool  // the last segment is open for writing: never removed

	dropL, dropB, dropSegs atomic.Uint64
}

// Open creates or reopens the backlog in cfg.Dir, cuts torn tails and reads
// the cursor.
func Open(cfg Config) (*Backlog, error) {
	if cfg.Dir == "" {
		return nil, errors.New("backlog: config Dir is empty")
	}
	if cfg.MaxBytes <= 0 {
		cfg.MaxBytes = 256 << 20
	}
	if cfg.SegmentBytes <= 0 {
		cfg.SegmentBytes = cfg.MaxBytes / 8
	}
	cfg.SegmentBytes = min(max(cfg.SegmentBytes, 4096), cfg.MaxBytes)
	b := &Backlog{dir: cfg.Dir, maxBytes: cfg.MaxBytes, segmentBytes: cfg.SegmentBytes, log: cfg.Logger}
	if b.log == nil {
		b.log = slog.Default()
	}
	if err := os.MkdirAll(filepath.Join(cfg.Dir, "rejected"), 0o755); err != nil {
		return nil, fmt.Errorf("backlog: %w", err)
	}
	if err := b.load(); err != nil {
		return nil, err
	}
	return b, nil
}

// load reads the segments and the cursor of an existing backlog.
func (b *Backlog) load() error {
	ents, err := os.ReadDir(b.dir)
	if err != nil {
		return fmt.Errorf("backlog: %w", err)
	}
	for _, e := range ents {
		start, ok := parseSegmentName(e.Name())
		if !ok || !e.Type().IsRegular() {
			continue
		}
		path := filepath.Join(b.dir, e.Name())
		size, err := cutTorn(path)
		if err != nil {
			return err
		}
		if size == 0 {
			if err := os.Remove(path); err != nil {
				return fmt.Errorf("backlog: %w", err)
			}
			continue
		}
		b.segs = append(b.segs, segment{start: start, size: size, path: path})
	}
	sort.Slice(b.segs, func(i, j int) bool { return b.segs[i].start < b.segs[j].start })
	// A segment that runs into the next one (a failed write that could not
	// be undone) is cut back to whole lines before the next one starts.
	for i := 1; i < len(b.segs); i++ {
		prev := &b.segs[i-1]
		if b.segs[i].start >= prev.end() {
			continue
		}
		keep, err := cutAt(prev.path, b.segs[i].start-prev.start)
		if err != nil {
			return err
		}
		b.log.Warn("tsdbpush: segment overlapped the next; cut", "segment", prev.path, "kept_bytes", keep)
		prev.size = keep
	}
	cpath := filepath.Join(b.dir, "cursor")
	data, err := os.ReadFile(cpath)
	switch {
	case errors.Is(err, os.ErrNotExist):
	case err != nil:
		return fmt.Errorf("backlog: %w", err)
	default:
		acked, err := parseCursor(data)
		if err != nil {
			// A damaged cursor costs duplicates, never losses: start from
			// the oldest segment.
			b.log.Warn("tsdbpush: cursor unreadable, resending the whole backlog", "path", cpath, "err", err)
		} else {
			b.acked = acked
		}
	}
	if len(b.segs) > 0 {
		last := b.segs[len(b.segs)-1]
		b.next = max(last.end(), b.acked)
		b.acked = max(b.acked, b.segs[0].start)
		if err := b.alignCursor(); err != nil {
			return err
		}
	} else {
		b.next = b.acked
	}
	b.removeAcked()
	return nil
}

// alignCursor moves an acked offset that falls inside a line (a damaged or
// foreign cursor) to the start of the next line, so no partial line is read.
func (b *Backlog) alignCursor() error {
	for _, s := range b.segs {
		if b.acked <= s.start || b.acked >= s.end() {
			continue
		}
		f, err := os.Open(s.path)
		if err != nil {
			return fmt.Errorf("backlog: %w", err)
		}
		defer f.Close()
		var one [1]byte
		if _, err := f.ReadAt(one[:], b.acked-s.start-1); err != nil {
			return fmt.Errorf("backlog: %s: %w", s.path, err)
		}
		if one[0] == '\n' {
			return nil
		}
		buf := make([]byte, s.end()-b.acked)
		if _, err := f.ReadAt(buf, b.acked-s.start); err != nil && !errors.Is(err, io.EOF) {
			return fmt.Errorf("backlog: %s: %w", s.path, err)
		}
		i := bytes.IndexByte(buf, '\n')
		b.log.Warn("tsdbpush: cursor inside a line, skipping to the next", "offset", b.acked, "segment", s.path)
		b.acked += int64(i + 1)
		return nil
	}
	return nil
}

// Pending returns the bytes written but not yet acknowledged.
func (b *Backlog) Pending() int64 {
	b.mu.Lock()
	defer b.mu.Unlock()
	return max(b.next-b.acked, 0)
}

// Offsets returns the logical offsets: every byte before acked is done
// with, and next is where the next byte written goes.
func (b *Backlog) Offsets() (acked, next int64) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.acked, b.next
}

// Stats returns the counters and the current size.
func (b *Backlog) Stats() Stats {
	b.mu.Lock()
	pending, n := max(b.next-b.acked, 0), len(b.segs)
	b.mu.Unlock()
	return Stats{
		PendingBytes: pending, Segments: n,
		DroppedLines: b.dropL.Load(), DroppedBytes: b.dropB.Load(), DroppedSegments: b.dropSegs.Load(),
	}
}

// Write appends buf, which must be whole lines, to the segments, starting a
// new segment at SegmentBytes on a line boundary. The lines are durable after
// the next Sync. A failed write drops (and counts) the lines it held, leaves
// no partial line behind and is returned; the rest of buf is still written.
func (b *Backlog) Write(buf []byte) error {
	var firstErr error
	for len(buf) > 0 {
		var room int64
		if b.cur != nil {
			b.mu.Lock()
			room = b.segmentBytes - b.segs[len(b.segs)-1].size
			b.mu.Unlock()
		}
		if b.cur == nil || room <= 0 {
			if err := b.rotate(); err != nil {
				b.dropWrite(buf, err)
				return err
			}
			continue
		}
		n := len(buf)
		if int64(n) > room {
			n = int(room)
			if i := bytes.IndexByte(buf[n-1:], '\n'); i >= 0 {
				n += i
			} else {
				n = len(buf)
			}
		}
		piece := buf[:n]
		buf = buf[n:]
		if _, err := b.cur.Write(piece); err != nil {
			b.dropWrite(piece, err)
			b.repairCur()
			if firstErr == nil {
				firstErr = fmt.Errorf("backlog: write: %w", err)
			}
			continue
		}
		b.mu.Lock()
		b.segs[len(b.segs)-1].size += int64(n)
		b.next += int64(n)
		b.mu.Unlock()
	}
	return firstErr
}

// dropWrite counts lines lost to a failed disk write.
func (b *Backlog) dropWrite(p []byte, err error) {
	b.dropL.Add(uint64(bytes.Count(p, []byte{'\n'})))
	b.dropB.Add(uint64(len(p)))
	b.log.Error("tsdbpush: backlog write failed, lines dropped", "bytes", len(p), "err", err)
}

// repairCur truncates the current segment back to the size recorded, so a
// partial write leaves no partial line, or closes it so that the next write
// starts a new segment.
func (b *Backlog) repairCur() {
	b.mu.Lock()
	size := b.segs[len(b.segs)-1].size
	b.mu.Unlock()
	if err := b.cur.Truncate(size); err != nil {
		b.closeCur()
	}
}

// closeCur closes the segment being written.
func (b *Backlog) closeCur() error {
	if b.cur == nil {
		return nil
	}
	err := b.cur.Close()
	b.cur = nil
	b.mu.Lock()
	b.writing = false
	b.mu.Unlock()
	return err
}

// rotate closes the current segment and starts one at the next offset.
func (b *Backlog) rotate() error {
	if b.cur != nil {
		if err := b.cur.Sync(); err != nil {
			return fmt.Errorf("backlog: fsync: %w", err)
		}
		b.closeCur()
	}
	b.mu.Lock()
	start := b.next // only the writer moves next
	b.mu.Unlock()
	path := filepath.Join(b.dir, segmentName(start))
	f, err := os.OpenFile(path, os.O_CREATE|os.O_EXCL|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return fmt.Errorf("backlog: new segment: %w", err)
	}
	if err := syncDir(b.dir); err != nil {
		f.Close()
		os.Remove(path) // else the next try at this offset fails on O_EXCL
		return err
	}
	b.cur = f
	b.mu.Lock()
	b.segs = append(b.segs, segment{start: start, path: path})
	b.writing = true
	b.mu.Unlock()
	return nil
}

// Sync fsyncs the segment being written and enforces the bound: while the
// segments exceed MaxBytes the oldest is removed, even if unsent. It
// returns what this call removed unsent (also counted in Stats and logged).
// The segment being written is never removed, so the bound is exceeded by
// at most one line.
func (b *Backlog) Sync() (Dropped, error) {
	var err error
	if b.cur != nil {
		if serr := b.cur.Sync(); serr != nil {
			err = fmt.Errorf("backlog: fsync: %w", serr)
		}
	}
	return b.enforceBound(), err
}

func (b *Backlog) enforceBound() Dropped {
	b.mu.Lock()
	defer b.mu.Unlock()
	var d Dropped
	var total int64
	for _, s := range b.segs {
		total += s.size
	}
	for total > b.maxBytes && len(b.segs) > 1 {
		s := b.segs[0]
		from := max(b.acked, s.start)
		if from < s.end() {
			lines := countLinesFrom(s.path, from-s.start)
			d.Segments++
			d.Lines += uint64(lines)
			d.Bytes += uint64(s.end() - from)
			d.LastSegment = s.path
			if d.To == 0 {
				d.From = from
			}
			d.To = s.end()
			b.dropB.Add(uint64(s.end() - from))
			b.dropL.Add(uint64(lines))
			b.dropSegs.Add(1)
			b.log.Warn("tsdbpush: backlog full, oldest unsent segment dropped",
				"segment", s.path, "unsent_bytes", s.end()-from, "unsent_lines", lines,
				"dropped_segments_total", b.dropSegs.Load(), "max_backlog_bytes", b.maxBytes)
		}
		if err := os.Remove(s.path); err != nil && !errors.Is(err, os.ErrNotExist) {
			b.log.Error("tsdbpush: remove segment", "err", err)
		}
		total -= s.size
		b.segs = b.segs[1:]
		b.acked = max(b.acked, b.segs[0].start)
	}
	return d
}

func countLinesFrom(path string, off int64) int {
	data, err := os.ReadFile(path)
	if err != nil || off > int64(len(data)) {
		return 0
	}
	return bytes.Count(data[off:], []byte{'\n'})
}

// removeAcked deletes segments whose every byte is acknowledged, except the
// one being written. Called with mu held or before the Backlog is shared.
func (b *Backlog) removeAcked() {
	keep := 0
	if b.writing {
		keep = 1
	}
	for len(b.segs) > keep && b.segs[0].end() <= b.acked {
		if err := os.Remove(b.segs[0].path); err != nil && !errors.Is(err, os.ErrNotExist) {
			b.log.Error("tsdbpush: remove segment", "err", err)
			return
		}
		b.segs = b.segs[1:]
	}
}

// Next cuts the next batch after the cursor: whole lines, at most maxLines
// lines (0: no limit) and maxBytes bytes, or one longer line. It returns
// false when every byte written is acknowledged. Calling Next again before
// Ack returns the same batch.
func (b *Backlog) Next(maxBytes, maxLines int) (Batch, bool, error) {
	for {
		b.mu.Lock()
		var s segment
		found := false
		for _, sg := range b.segs {
			if sg.end() > b.acked {
				s, found = sg, true
				break
			}
		}
		if !found {
			b.mu.Unlock()
			return Batch{}, false, nil
		}
		if b.acked < s.start {
			b.acked = s.start // a gap left by a cut torn tail
		}
		off := b.acked
		b.mu.Unlock()
		avail := s.end() - off
		data, err := readBatch(s.path, off-s.start, avail, maxBytes, maxLines)
		if errors.Is(err, os.ErrNotExist) {
			continue // dropped by the bound meanwhile; acked has moved
		}
		if err != nil {
			return Batch{}, false, err
		}
		if len(data) == 0 {
			// No newline in the rest of the segment: not whole lines. Skip.
			b.log.Warn("tsdbpush: segment ends without a newline, skipping its tail", "segment", s.path, "bytes", avail)
			b.mu.Lock()
			b.acked = max(b.acked, s.end())
			b.mu.Unlock()
			continue
		}
		return Batch{Start: off, End: off + int64(len(data)), Data: data, Lines: bytes.Count(data, []byte{'\n'})}, true, nil
	}
}

// readBatch reads whole lines from path at off: at most maxLines lines and
// maxBytes bytes, or one longer line.
func readBatch(path string, off, avail int64, maxBytes, maxLines int) ([]byte, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("backlog: %w", err)
	}
	defer f.Close()
	want := min(avail, int64(max(maxBytes, 1)))
	for {
		buf := make([]byte, want)
		n, err := f.ReadAt(buf, off)
		if err != nil && !errors.Is(err, io.EOF) {
			return nil, fmt.Errorf("backlog: %s at %d: %w", path, off, err)
		}
		buf = buf[:n]
		if cut := batchCut(buf, maxLines); cut > 0 {
			return buf[:cut], nil
		}
		if int64(n) < want || want >= avail {
			return nil, nil
		}
		want = min(avail, want*2)
	}
}

// Ack records that every byte before end is done with (sent, or set aside),
// writes the cursor and removes fully acknowledged segments. The cursor never
// moves back. An error means the cursor file could not be written: the
// acknowledgement holds in memory, and after a restart the lines since the
// last cursor written are read again.
func (b *Backlog) Ack(end int64) error {
	b.mu.Lock()
	b.acked = max(b.acked, min(end, b.next))
	acked := b.acked
	b.mu.Unlock()
	err := writeCursor(b.dir, acked)
	b.mu.Lock()
	b.removeAcked()
	b.mu.Unlock()
	return err
}

// SetAside keeps a copy of a batch under rejected/, named after its start
// offset, and returns the file's path. It does not acknowledge the batch.
// The copy is durable when SetAside returns nil, so that an Ack past the
// batch afterwards cannot outlive it in a power cut.
func (b *Backlog) SetAside(bt Batch) (string, error) {
	path := filepath.Join(b.dir, "rejected", fmt.Sprintf("%020d.lp", bt.Start))
	if err := durable.WriteFile(path, bt.Data, 0o644); err != nil {
		return path, fmt.Errorf("backlog: set aside: %w", err)
	}
	return path, nil
}

// Close closes the segment being written and writes the cursor. Call it
// when neither side is in use any more.
func (b *Backlog) Close() error {
	err := b.closeCur()
	if err != nil {
		err = fmt.Errorf("backlog: %w", err)
	}
	b.mu.Lock()
	acked := b.acked
	b.mu.Unlock()
	if cerr := writeCursor(b.dir, acked); cerr != nil && err == nil {
		err = cerr
	}
	return err
}

func syncDir(dir string) error {
	if err := durable.SyncDir(dir); err != nil {
		return fmt.Errorf("backlog: %w", err)
	}
	return nil
}

// cutTorn cuts a segment after its last newline, the way the recorder
// recovers its own files (reading only the tail), and returns the size kept.
func cutTorn(path string) (int64, error) {
	st, err := os.Stat(path)
	if err != nil {
		return 0, fmt.Errorf("backlog: %w", err)
	}
	cut, err := record.CutTornTail(path)
	if err != nil {
		return 0, fmt.Errorf("backlog: cut torn tail: %w", err)
	}
	return st.Size() - cut, nil
}

// cutAt truncates a segment to the whole lines within its first n bytes.
func cutAt(path string, n int64) (int64, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return 0, fmt.Errorf("backlog: %w", err)
	}
	keep := int64(wholeLen(data[:min(int64(len(data)), max(n, 0))]))
	if err := os.Truncate(path, keep); err != nil {
		return 0, fmt.Errorf("backlog: cut %s: %w", path, err)
	}
	return keep, nil
}

// writeCursor replaces the cursor file durably (pipeline/durable).
func writeCursor(dir string, acked int64) error {
	if err := durable.WriteFile(filepath.Join(dir, "cursor"), formatCursor(acked), 0o644); err != nil {
		return fmt.Errorf("backlog: cursor: %w", err)
	}
	return nil
}
