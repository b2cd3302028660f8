// Package tsdbpush sends recorded line protocol to an InfluxDB-compatible
// HTTP write endpoint (InfluxDB 1.x /write, InfluxDB 2.x /api/v2/write,
// VictoriaMetrics /write), through a bounded on-disk backlog that survives a
// restart and a server outage.
//
// # Flow
//
// Append copies whole lines into an in-memory staging buffer and returns; it
// never touches the disk or the network, so the recorder is never slowed.
// Run owns two loops: a writer that moves staged lines into segment files
// (appending, fsync on every flush, at most every FlushEvery or as soon as a
// batch's worth is staged), and a sender that cuts batches from the segment
// files and POSTs them.
//
// # Backlog layout
//
//	<Dir>/seg-<offset>.lp   segment files; <offset> is the 20-digit logical
//	                        byte offset of the segment's first byte in the
//	                        stream of all lines ever appended
//	<Dir>/cursor            "tsdbpush cursor v1 acked=<offset> crc=<crc32>\n":
//	                        every byte before <offset> was accepted (2xx)
//	<Dir>/rejected/<offset>.lp  batches the server refused as malformed
//
// Segments are removed once fully acknowledged. The directory is bounded by
// MaxBacklogBytes (plus at most one line): when it is exceeded the oldest
// segment is removed even if unsent, and what it held unsent is counted in
// Stats.DroppedBytes/DroppedLines/DroppedSegments and logged. On Open a torn
// last line (a crash in the middle of a write) is cut from every segment, so
// only whole lines are ever sent; lines the cursor says were accepted are
// not sent again.
//
// # Why a retry does not duplicate points
//
// A batch is an exact byte range [start, end) of the backlog, cut at line
// boundaries, and the cursor advances to end only after the server answered
// 2xx (204 from InfluxDB). A failed or timed-out request, or a restart before
// the acknowledgement was written, therefore resends exactly the same bytes:
// the same lines with the same measurement, tag set and nanosecond timestamp.
// InfluxDB treats a point with an existing series key and timestamp as an
// overwrite of that point (with identical fields it is a no-op), so a batch
// that had in fact been written before the failure is not stored twice.
// VictoriaMetrics stores samples, not points; it drops the second copy of a
// sample with the same series and timestamp when started with
// -dedup.minScrapeInterval (1ms is enough for recorded data). Because the
// ranges are taken from the backlog rather than rebuilt, nothing (order,
// float formatting, timestamps) can differ between two sends of a batch.
//
// # Server answers
//
//   - 2xx: the batch is acknowledged.
//   - 429 and 503: retried after Retry-After (seconds or an HTTP date) when
//     given, else after the backoff.
//   - 400, 413, 422 and the other 4xx not listed below: the batch is refused
//     for its content; it is written to rejected/, counted and logged once,
//     and the cursor moves past it so later batches go through.
//   - 401, 403, 404 (InfluxDB 1.x: database not found) and 408: a problem of
//     the configuration or the moment, not of the batch; retried with backoff
//     like 5xx and network errors, so a wrong token does not throw data away.
//
// Backoff is exponential from MinBackoff to MaxBackoff with equal jitter (a
// wait of d/2 plus a random part of up to d/2). Failures are logged once per
// burst and the recovery once.
package tsdbpush

import (
	"bytes"
	"compress/gzip"
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// Config configures a Pusher. URL and Dir are required; every other field has
// a useful zero value.
type Config struct {
	// URL is the full write URL with its query, e.g.
	// http://127.0.0.1:8086/write?db=plenum&precision=ns (InfluxDB 1.x,
	// VictoriaMetrics) or
	// http://127.0.0.1:8086/api/v2/write?org=o&bucket=b&precision=ns.
	URL string
	// Token, when set, is sent as "Authorization: Token <Token>".
	Token string
	// Username and Password, when Username is set and Token is not, are sent
	// as HTTP basic auth.
	Username, Password string
	// Dir holds the backlog; created if missing.
	Dir string
	// MaxBacklogBytes bounds the segment files on disk; default 256 MiB.
	MaxBacklogBytes int64
	// SegmentBytes is the size at which a new segment file is started;
	// default MaxBacklogBytes/8, at least 4 KiB and at most MaxBacklogBytes.
	SegmentBytes int64
	// BatchBytes and BatchLines bound one request; defaults 512 KiB and
	// 5000 lines. A single line longer than BatchBytes is sent alone.
	BatchBytes int
	BatchLines int
	// FlushEvery is how often staged lines are written and fsynced and how
	// long a small batch may wait before it is sent; default 1 s.
	FlushEvery time.Duration
	// Timeout bounds one request; default 10 s.
	Timeout time.Duration
	// Gzip compresses request bodies (Content-Encoding: gzip).
	Gzip bool
	// MinBackoff and MaxBackoff bound the retry wait; defaults 500 ms, 30 s.
	MinBackoff, MaxBackoff time.Duration
	// MaxRetryAfter caps a server's Retry-After; default 5 min.
	MaxRetryAfter time.Duration
	// Logger receives warnings; default slog.Default().
	Logger *slog.Logger
	// HTTPClient sends the requests; default a new http.Client.
	HTTPClient *http.Client
	// Sleep waits d or until ctx is done; default a timer. Tests inject it to
	// observe and shorten the waits.
	Sleep func(ctx context.Context, d time.Duration) error
}

// Stats are the Pusher's counters since Open (BacklogBytes and LastError are
// the current state).
type Stats struct {
	AppendedLines, AppendedBytes uint64 // taken by Append
	SentLines, SentBytes         uint64 // acknowledged by the server
	Batches                      uint64 // requests acknowledged
	Retries                      uint64 // requests repeated after a failure
	RejectedBatches              uint64 // set aside in rejected/
	RejectedLines, RejectedBytes uint64
	// DroppedLines/DroppedBytes are lines lost unsent: oldest segments
	// removed to keep the bound, staging full, or a failed disk write.
	DroppedLines, DroppedBytes uint64
	DroppedSegments            uint64 // segments removed while unsent
	BacklogBytes               int64  // unsent bytes on disk and staged
	LastError                  string // the latest failure, "" if none yet
	LastErrorAt                time.Time
}

// Staging chunks: Append copies into 1 MiB chunks that are reused, so a
// steady stream allocates nothing and never moves staged bytes.
const (
	chunkBytes    = 1 << 20
	maxFreeChunks = 16
)

// ErrClosed is returned by Append after Close.
var ErrClosed = errors.New("tsdbpush: closed")

type segment struct {
	start, size int64
	path        string
}

func (s segment) end() int64 { return s.start + s.size }

// Pusher is a backlog and its sender. Append, Stats and Close are safe for
// concurrent use; Run runs at most once at a time.
type Pusher struct {
	cfg    Config
	url    string
	log    *slog.Logger
	client *http.Client
	sleep  func(context.Context, time.Duration) error
	memCap int

	// mu guards the staging buffer; Append holds it only to copy.
	mu      sync.Mutex
	mem     [][]byte // staged lines in chunks; each chunk ends at a line end
	memN    int      // bytes in mem
	free    [][]byte // empty chunks for reuse
	closed  bool
	dropped bool // staging overflowed since the last flush

	// wmu serialises flushes (writer loop, Run's last flush, Close).
	wmu      sync.Mutex
	cur      *os.File // segment being written; the last in segs
	flushing atomic.Int64

	// dmu guards the disk state shared by writer and sender.
	dmu   sync.Mutex
	segs  []segment
	acked int64 // next byte to send; all before it accepted or given up
	next  int64 // logical offset of the next byte to write

	running atomic.Bool
	kick    chan struct{} // staging has a batch's worth
	ready   chan struct{} // new bytes on disk

	appLines, appBytes     atomic.Uint64
	sentLines, sentBytes   atomic.Uint64
	batches, retries       atomic.Uint64
	rejB, rejL, rejBytes   atomic.Uint64
	dropL, dropB, dropSegs atomic.Uint64

	emu     sync.Mutex
	lastErr string
	lastAt  time.Time
}

// Open validates cfg, creates or reopens the backlog in cfg.Dir, cuts torn
// tails and reads the cursor. Lines left unsent by an earlier process are
// sent by Run.
func Open(cfg Config) (*Pusher, error) {
	u, err := url.Parse(cfg.URL)
	if err != nil {
		return nil, fmt.Errorf("tsdbpush: config URL: %w", err)
	}
	if (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return nil, fmt.Errorf("tsdbpush: config URL %q: want http(s)://host[:port]/path", cfg.URL)
	}
	if cfg.Dir == "" {
		return nil, errors.New("tsdbpush: config Dir is empty")
	}
	if cfg.MaxBacklogBytes <= 0 {
		cfg.MaxBacklogBytes = 256 << 20
	}
	if cfg.SegmentBytes <= 0 {
		cfg.SegmentBytes = cfg.MaxBacklogBytes / 8
	}
	cfg.SegmentBytes = min(max(cfg.SegmentBytes, 4096), cfg.MaxBacklogBytes)
	if cfg.BatchBytes <= 0 {
		cfg.BatchBytes = 512 << 10
	}
	if cfg.BatchLines <= 0 {
		cfg.BatchLines = 5000
	}
	if cfg.FlushEvery <= 0 {
		cfg.FlushEvery = time.Second
	}
	if cfg.Timeout <= 0 {
		cfg.Timeout = 10 * time.Second
	}
	if cfg.MinBackoff <= 0 {
		cfg.MinBackoff = 500 * time.Millisecond
	}
	if cfg.MaxBackoff < cfg.MinBackoff {
		cfg.MaxBackoff = max(30*time.Second, cfg.MinBackoff)
	}
	if cfg.MaxRetryAfter <= 0 {
		cfg.MaxRetryAfter = 5 * time.Minute
	}
	p := &Pusher{
		cfg:    cfg,
		url:    cfg.URL,
		log:    cfg.Logger,
		client: cfg.HTTPClient,
		sleep:  cfg.Sleep,
		kick:   make(chan struct{}, 1),
		ready:  make(chan struct{}, 1),
	}
	if p.log == nil {
		p.log = slog.Default()
	}
	if p.client == nil {
		p.client = &http.Client{}
	}
	if p.sleep == nil {
		p.sleep = sleepCtx
	}
	// Staging holds what the writer has not yet put on disk: enough for a
	// few seconds of a slow disk, never more than the backlog itself.
	p.memCap = int(min(cfg.MaxBacklogBytes, 64<<20))
	if err := os.MkdirAll(filepath.Join(cfg.Dir, "rejected"), 0o755); err != nil {
		return nil, fmt.Errorf("tsdbpush: %w", err)
	}
	if err := p.load(); err != nil {
		return nil, err
	}
	return p, nil
}

// load reads the segments and the cursor of an existing backlog.
func (p *Pusher) load() error {
	ents, err := os.ReadDir(p.cfg.Dir)
	if err != nil {
		return fmt.Errorf("tsdbpush: %w", err)
	}
	for _, e := range ents {
		start, ok := parseSegmentName(e.Name())
		if !ok || !e.Type().IsRegular() {
			continue
		}
		path := filepath.Join(p.cfg.Dir, e.Name())
		size, err := cutTorn(path)
		if err != nil {
			return err
		}
		if size == 0 {
			if err := os.Remove(path); err != nil {
				return fmt.Errorf("tsdbpush: %w", err)
			}
			continue
		}
		p.segs = append(p.segs, segment{start: start, size: size, path: path})
	}
	sort.Slice(p.segs, func(i, j int) bool { return p.segs[i].start < p.segs[j].start })
	// A segment that runs into the next one (a failed write that could not
	// be undone) is cut back to whole lines before the next one starts.
	for i := 1; i < len(p.segs); i++ {
		prev := &p.segs[i-1]
		if p.segs[i].start >= prev.end() {
			continue
		}
		keep, err := cutAt(prev.path, p.segs[i].start-prev.start)
		if err != nil {
			return err
		}
		p.log.Warn("tsdbpush: segment overlapped the next; cut", "segment", prev.path, "kept_bytes", keep)
		prev.size = keep
	}
	cpath := filepath.Join(p.cfg.Dir, "cursor")
	b, err := os.ReadFile(cpath)
	switch {
	case errors.Is(err, os.ErrNotExist):
	case err != nil:
		return fmt.Errorf("tsdbpush: %w", err)
	default:
		acked, err := parseCursor(b)
		if err != nil {
			// A damaged cursor costs duplicates (harmless, see the package
			// doc), never losses: start from the oldest segment.
			p.log.Warn("tsdbpush: cursor unreadable, resending the whole backlog", "path", cpath, "err", err)
		} else {
			p.acked = acked
		}
	}
	if len(p.segs) > 0 {
		last := p.segs[len(p.segs)-1]
		p.next = max(last.end(), p.acked)
		p.acked = max(p.acked, p.segs[0].start)
		if err := p.alignCursor(); err != nil {
			return err
		}
	} else {
		p.next = p.acked
	}
	p.removeAcked()
	return nil
}

// alignCursor moves an acked offset that falls inside a line (a damaged or
// foreign cursor) to the start of the next line, so no partial line is sent.
func (p *Pusher) alignCursor() error {
	for _, s := range p.segs {
		if p.acked <= s.start || p.acked >= s.end() {
			continue
		}
		f, err := os.Open(s.path)
		if err != nil {
			return fmt.Errorf("tsdbpush: %w", err)
		}
		defer f.Close()
		var one [1]byte
		if _, err := f.ReadAt(one[:], p.acked-s.start-1); err != nil {
			return fmt.Errorf("tsdbpush: %s: %w", s.path, err)
		}
		if one[0] == '\n' {
			return nil
		}
		buf := make([]byte, s.end()-p.acked)
		if _, err := f.ReadAt(buf, p.acked-s.start); err != nil && !errors.Is(err, io.EOF) {
			return fmt.Errorf("tsdbpush: %s: %w", s.path, err)
		}
		i := bytes.IndexByte(buf, '\n')
		p.log.Warn("tsdbpush: cursor inside a line, skipping to the next", "offset", p.acked, "segment", s.path)
		p.acked += int64(i + 1)
		return nil
	}
	return nil
}

// Append stages whole lines (each ending in '\n') for sending. It copies
// lines, never blocks on disk or network, and when the staging buffer is
// full (the writer cannot keep up, or Run is not running) it drops the lines
// and counts them in Stats.DroppedLines.
func (p *Pusher) Append(lines []byte) error {
	if len(lines) == 0 {
		return nil
	}
	if lines[len(lines)-1] != '\n' {
		return fmt.Errorf("tsdbpush: append: %d bytes do not end in a newline: only whole lines", len(lines))
	}
	n := uint64(bytes.Count(lines, []byte{'\n'}))
	p.mu.Lock()
	if p.closed {
		p.mu.Unlock()
		return ErrClosed
	}
	if p.memN+len(lines) > p.memCap {
		p.dropped = true
		p.mu.Unlock()
		p.dropL.Add(n)
		p.dropB.Add(uint64(len(lines)))
		return nil
	}
	last := len(p.mem) - 1
	if last < 0 || len(p.mem[last])+len(lines) > cap(p.mem[last]) {
		var c []byte
		if n := len(p.free); n > 0 && len(lines) <= chunkBytes {
			c, p.free = p.free[n-1], p.free[:n-1]
		} else {
			c = make([]byte, 0, max(chunkBytes, len(lines)))
		}
		p.mem = append(p.mem, c)
		last++
	}
	p.mem[last] = append(p.mem[last], lines...)
	p.memN += len(lines)
	full := p.memN >= p.cfg.BatchBytes
	p.mu.Unlock()
	p.appLines.Add(n)
	p.appBytes.Add(uint64(len(lines)))
	if full {
		select {
		case p.kick <- struct{}{}:
		default:
		}
	}
	return nil
}

// Stats returns the counters.
func (p *Pusher) Stats() Stats {
	p.mu.Lock()
	staged := int64(p.memN)
	p.mu.Unlock()
	p.dmu.Lock()
	disk := p.next - p.acked
	p.dmu.Unlock()
	p.emu.Lock()
	le, at := p.lastErr, p.lastAt
	p.emu.Unlock()
	return Stats{
		AppendedLines: p.appLines.Load(), AppendedBytes: p.appBytes.Load(),
		SentLines: p.sentLines.Load(), SentBytes: p.sentBytes.Load(),
		Batches: p.batches.Load(), Retries: p.retries.Load(),
		RejectedBatches: p.rejB.Load(), RejectedLines: p.rejL.Load(), RejectedBytes: p.rejBytes.Load(),
		DroppedLines: p.dropL.Load(), DroppedBytes: p.dropB.Load(), DroppedSegments: p.dropSegs.Load(),
		BacklogBytes: max(disk, 0) + staged + p.flushing.Load(),
		LastError:    le, LastErrorAt: at,
	}
}

func (p *Pusher) setErr(err error) {
	p.emu.Lock()
	p.lastErr, p.lastAt = err.Error(), time.Now()
	p.emu.Unlock()
}

// Run writes staged lines to disk and sends the backlog until ctx is done,
// then flushes what is staged to disk and returns nil, or the error of that
// last flush. Sending failures never end Run; they are retried, counted and
// reported in Stats.
func (p *Pusher) Run(ctx context.Context) error {
	if !p.running.CompareAndSwap(false, true) {
		return errors.New("tsdbpush: Run is already running")
	}
	defer p.running.Store(false)
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		p.writeLoop(ctx)
	}()
	p.sendLoop(ctx)
	wg.Wait()
	return p.flush()
}

func (p *Pusher) writeLoop(ctx context.Context) {
	t := time.NewTicker(p.cfg.FlushEvery)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-p.kick:
		case <-t.C:
		}
		if err := p.flush(); err != nil {
			p.log.Error("tsdbpush: backlog write failed", "err", err)
		}
	}
}

// flush moves the staged lines into segment files and fsyncs.
func (p *Pusher) flush() error {
	p.wmu.Lock()
	defer p.wmu.Unlock()
	p.mu.Lock()
	chunks := p.mem
	p.mem = nil
	p.flushing.Store(int64(p.memN))
	p.memN = 0
	dropped := p.dropped
	p.dropped = false
	p.mu.Unlock()
	if dropped {
		p.log.Warn("tsdbpush: staging full, lines dropped (disk too slow or Run not running)",
			"dropped_lines_total", p.dropL.Load())
		p.setErr(errors.New("tsdbpush: staging full, lines dropped"))
	}
	var err error
	for _, c := range chunks {
		if werr := p.writeAll(c); werr != nil && err == nil {
			err = werr
		}
	}
	if err2 := p.syncAndBound(); err2 != nil && err == nil {
		err = err2
	}
	p.flushing.Store(0)
	p.mu.Lock()
	for _, c := range chunks {
		if cap(c) == chunkBytes && len(p.free) < maxFreeChunks {
			p.free = append(p.free, c[:0])
		}
	}
	p.mu.Unlock()
	if err != nil {
		p.setErr(err)
		return err
	}
	if len(chunks) > 0 {
		select {
		case p.ready <- struct{}{}:
		default:
		}
	}
	return nil
}

// writeAll appends buf (whole lines) to the segments, rotating at
// SegmentBytes on line boundaries.
func (p *Pusher) writeAll(buf []byte) error {
	var firstErr error
	for len(buf) > 0 {
		p.dmu.Lock()
		var room int64
		if p.cur != nil {
			room = p.cfg.SegmentBytes - p.segs[len(p.segs)-1].size
		}
		p.dmu.Unlock()
		if p.cur == nil || room <= 0 {
			if err := p.rotate(); err != nil {
				p.dropWrite(buf, err)
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
		if _, err := p.cur.Write(piece); err != nil {
			p.dropWrite(piece, err)
			p.repairCur()
			firstErr = fmt.Errorf("tsdbpush: backlog write: %w", err)
			continue
		}
		p.dmu.Lock()
		p.segs[len(p.segs)-1].size += int64(n)
		p.next += int64(n)
		p.dmu.Unlock()
	}
	return firstErr
}

// syncAndBound fsyncs the segment being written and enforces the bound.
func (p *Pusher) syncAndBound() error {
	var err error
	if p.cur != nil {
		if serr := p.cur.Sync(); serr != nil {
			err = fmt.Errorf("tsdbpush: backlog fsync: %w", serr)
		}
	}
	p.enforceBound()
	return err
}

// dropWrite counts lines lost to a failed disk write.
func (p *Pusher) dropWrite(b []byte, err error) {
	p.dropL.Add(uint64(bytes.Count(b, []byte{'\n'})))
	p.dropB.Add(uint64(len(b)))
	p.log.Error("tsdbpush: backlog write failed, lines dropped", "bytes", len(b), "err", err)
}

// repairCur truncates the current segment back to the size recorded, so a
// partial write leaves no partial line, or starts a new segment.
func (p *Pusher) repairCur() {
	p.dmu.Lock()
	size := p.segs[len(p.segs)-1].size
	p.dmu.Unlock()
	if err := p.cur.Truncate(size); err != nil {
		p.cur.Close()
		p.cur = nil
	}
}

// rotate closes the current segment and starts one at the next offset.
func (p *Pusher) rotate() error {
	if p.cur != nil {
		if err := p.cur.Sync(); err != nil {
			return fmt.Errorf("tsdbpush: backlog fsync: %w", err)
		}
		p.cur.Close()
		p.cur = nil
	}
	p.dmu.Lock()
	start := p.next
	p.dmu.Unlock()
	path := filepath.Join(p.cfg.Dir, segmentName(start))
	f, err := os.OpenFile(path, os.O_CREATE|os.O_EXCL|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return fmt.Errorf("tsdbpush: new segment: %w", err)
	}
	if err := syncDir(p.cfg.Dir); err != nil {
		f.Close()
		return err
	}
	p.cur = f
	p.dmu.Lock()
	p.segs = append(p.segs, segment{start: start, path: path})
	p.dmu.Unlock()
	return nil
}

// enforceBound removes the oldest segments while the backlog is over
// MaxBacklogBytes, counting what they held unsent. The segment being written
// is never removed, so the bound is exceeded by at most one line.
func (p *Pusher) enforceBound() {
	p.dmu.Lock()
	defer p.dmu.Unlock()
	var total int64
	for _, s := range p.segs {
		total += s.size
	}
	for total > p.cfg.MaxBacklogBytes && len(p.segs) > 1 {
		s := p.segs[0]
		from := max(p.acked, s.start)
		if from < s.end() {
			lines := countLinesFrom(s.path, from-s.start)
			p.dropB.Add(uint64(s.end() - from))
			p.dropL.Add(uint64(lines))
			p.dropSegs.Add(1)
			p.log.Warn("tsdbpush: backlog full, oldest unsent segment dropped",
				"segment", s.path, "unsent_bytes", s.end()-from, "unsent_lines", lines,
				"dropped_segments_total", p.dropSegs.Load(), "max_backlog_bytes", p.cfg.MaxBacklogBytes)
			p.emu.Lock()
			p.lastErr, p.lastAt = fmt.Sprintf("tsdbpush: backlog full, dropped %d unsent bytes of %s", s.end()-from, s.path), time.Now()
			p.emu.Unlock()
		}
		if err := os.Remove(s.path); err != nil && !errors.Is(err, os.ErrNotExist) {
			p.log.Error("tsdbpush: remove segment", "err", err)
		}
		total -= s.size
		p.segs = p.segs[1:]
		p.acked = max(p.acked, p.segs[0].start)
	}
}

func countLinesFrom(path string, off int64) int {
	b, err := os.ReadFile(path)
	if err != nil || off > int64(len(b)) {
		return 0
	}
	return bytes.Count(b[off:], []byte{'\n'})
}

// removeAcked deletes segments whose every byte is acknowledged, except the
// one being written. Called with dmu held or before Run.
func (p *Pusher) removeAcked() {
	keep := 0
	if p.cur != nil {
		keep = 1
	}
	for len(p.segs) > keep && p.segs[0].end() <= p.acked {
		if err := os.Remove(p.segs[0].path); err != nil && !errors.Is(err, os.ErrNotExist) {
			p.log.Error("tsdbpush: remove segment", "err", err)
			return
		}
		p.segs = p.segs[1:]
	}
}

// batch is an exact byte range of the backlog.
type batch struct {
	start, end int64
	data       []byte
	lines      int
}

// nextBatch cuts the next batch from the backlog, or returns false when
// everything on disk is sent.
func (p *Pusher) nextBatch() (batch, bool, error) {
	for {
		p.dmu.Lock()
		var s segment
		found := false
		for _, sg := range p.segs {
			if sg.end() > p.acked {
				s, found = sg, true
				break
			}
		}
		if !found {
			p.dmu.Unlock()
			return batch{}, false, nil
		}
		if p.acked < s.start {
			p.acked = s.start // a gap left by a cut torn tail
		}
		off := p.acked
		p.dmu.Unlock()
		avail := s.end() - off
		b, err := readBatch(s.path, off-s.start, avail, p.cfg.BatchBytes, p.cfg.BatchLines)
		if errors.Is(err, os.ErrNotExist) {
			continue // dropped by the bound meanwhile; acked has moved
		}
		if err != nil {
			return batch{}, false, err
		}
		if len(b) == 0 {
			// No newline in the rest of the segment: not whole lines. Skip.
			p.log.Warn("tsdbpush: segment ends without a newline, skipping its tail", "segment", s.path, "bytes", avail)
			p.dmu.Lock()
			p.acked = max(p.acked, s.end())
			p.dmu.Unlock()
			continue
		}
		return batch{start: off, end: off + int64(len(b)), data: b, lines: bytes.Count(b, []byte{'\n'})}, true, nil
	}
}

// readBatch reads whole lines from path at off: at most maxLines lines and
// maxBytes bytes, or one longer line.
func readBatch(path string, off, avail int64, maxBytes, maxLines int) ([]byte, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("tsdbpush: %w", err)
	}
	defer f.Close()
	want := min(avail, int64(maxBytes))
	for {
		buf := make([]byte, want)
		n, err := f.ReadAt(buf, off)
		if err != nil && !errors.Is(err, io.EOF) {
			return nil, fmt.Errorf("tsdbpush: %s at %d: %w", path, off, err)
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

// sendLoop sends batches until ctx is done.
func (p *Pusher) sendLoop(ctx context.Context) {
	t := time.NewTicker(p.cfg.FlushEvery)
	defer t.Stop()
	for ctx.Err() == nil {
		b, ok, err := p.nextBatch()
		if err != nil {
			p.setErr(err)
			p.log.Error("tsdbpush: backlog read failed", "err", err)
			if p.sleep(ctx, p.cfg.MaxBackoff) != nil {
				return
			}
			continue
		}
		if !ok {
			select {
			case <-ctx.Done():
				return
			case <-p.ready:
			case <-t.C:
			}
			continue
		}
		if err := p.send(ctx, b); err != nil {
			return // ctx done
		}
	}
}

// outcome of one request.
type outcome int

const (
	accepted outcome = iota
	retry
	reject
)

// send posts b until it is accepted or set aside; it returns an error only
// when ctx is done.
func (p *Pusher) send(ctx context.Context, b batch) error {
	body := b.data
	if p.cfg.Gzip {
		var zb bytes.Buffer
		zw := gzip.NewWriter(&zb)
		zw.Write(b.data) // writes to a bytes.Buffer do not fail
		zw.Close()
		body = zb.Bytes()
	}
	failing := false
	for attempt := 0; ; attempt++ {
		if attempt > 0 {
			p.retries.Add(1)
		}
		out, wait, msg, err := p.post(ctx, body)
		switch {
		case out == retry && ctx.Err() != nil:
			return ctx.Err()
		case out == retry:
		case out == accepted:
			if failing {
				p.log.Info("tsdbpush: server accepts writes again", "attempts", attempt+1)
			}
			p.sentLines.Add(uint64(b.lines))
			p.sentBytes.Add(uint64(len(b.data)))
			p.batches.Add(1)
			return p.ack(b)
		default:
			p.setAside(b, msg)
			return p.ack(b)
		}
		p.setErr(err)
		if !failing {
			p.log.Warn("tsdbpush: write failed, retrying with backoff", "err", err, "offset", b.start)
			failing = true
		} else {
			p.log.Debug("tsdbpush: write failed again", "err", err, "attempt", attempt+1)
		}
		if wait <= 0 {
			wait = p.backoff(attempt)
		}
		if err := p.sleep(ctx, wait); err != nil {
			return err
		}
	}
}

// backoff is the wait after the attempt-th failure (0-based): exponential,
// capped, with equal jitter.
func (p *Pusher) backoff(attempt int) time.Duration {
	d := p.cfg.MinBackoff
	for i := 0; i < attempt && d < p.cfg.MaxBackoff; i++ {
		d *= 2
	}
	d = min(d, p.cfg.MaxBackoff)
	half := d / 2
	return half + rand.N(half+1)
}

// inFlightGrace is how long a request in flight may still take once Run's
// context has ended.
const inFlightGrace = 2 * time.Second

// post makes one request. For retry it returns the server's Retry-After
// (0 if none) and the error to report.
func (p *Pusher) post(ctx context.Context, body []byte) (outcome, time.Duration, string, error) {
	// A request in flight when ctx ends gets a short grace: cut off, the
	// server may have stored it without our knowing, and it would be sent
	// again after a restart (harmless where writes are idempotent, but
	// needless).
	rctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), p.cfg.Timeout)
	defer cancel()
	stop := context.AfterFunc(ctx, func() { time.AfterFunc(inFlightGrace, cancel) })
	defer stop()
	req, err := http.NewRequestWithContext(rctx, http.MethodPost, p.url, bytes.NewReader(body))
	if err != nil {
		return retry, 0, "", fmt.Errorf("tsdbpush: request: %w", err)
	}
	req.Header.Set("Content-Type", "text/plain; charset=utf-8")
	if p.cfg.Gzip {
		req.Header.Set("Content-Encoding", "gzip")
	}
	switch {
	case p.cfg.Token != "":
		req.Header.Set("Authorization", "Token "+p.cfg.Token)
	case p.cfg.Username != "":
		req.SetBasicAuth(p.cfg.Username, p.cfg.Password)
	}
	resp, err := p.client.Do(req)
	if err != nil {
		return retry, 0, "", fmt.Errorf("tsdbpush: post: %w", err)
	}
	defer resp.Body.Close()
	msgb, _ := io.ReadAll(io.LimitReader(resp.Body, 2048))
	io.Copy(io.Discard, io.LimitReader(resp.Body, 1<<20)) // let the connection be reused
	msg := string(bytes.TrimSpace(msgb))
	code := resp.StatusCode
	switch {
	case code >= 200 && code < 300:
		return accepted, 0, "", nil
	case code == http.StatusTooManyRequests || code == http.StatusServiceUnavailable:
		wait, _ := parseRetryAfter(resp.Header.Get("Retry-After"), time.Now())
		return retry, min(wait, p.cfg.MaxRetryAfter), msg, fmt.Errorf("tsdbpush: server answered %d: %s", code, msg)
	case code == http.StatusUnauthorized || code == http.StatusForbidden ||
		code == http.StatusNotFound || code == http.StatusRequestTimeout:
		return retry, 0, msg, fmt.Errorf("tsdbpush: server answered %d (check URL, database and credentials): %s", code, msg)
	case code >= 400 && code < 500:
		return reject, 0, fmt.Sprintf("%d: %s", code, msg), nil
	default:
		return retry, 0, msg, fmt.Errorf("tsdbpush: server answered %d: %s", code, msg)
	}
}

// setAside writes a refused batch to rejected/ and counts it.
func (p *Pusher) setAside(b batch, msg string) {
	p.rejB.Add(1)
	p.rejL.Add(uint64(b.lines))
	p.rejBytes.Add(uint64(len(b.data)))
	path := filepath.Join(p.cfg.Dir, "rejected", fmt.Sprintf("%020d.lp", b.start))
	if err := os.WriteFile(path, b.data, 0o644); err != nil {
		p.log.Error("tsdbpush: cannot keep rejected batch", "path", path, "err", err)
	}
	p.log.Warn("tsdbpush: server refused a batch; set aside", "answer", msg, "lines", b.lines,
		"path", path, "rejected_batches_total", p.rejB.Load())
	p.setErr(fmt.Errorf("tsdbpush: batch at %d refused: %s", b.start, msg))
}

// ack records that everything before b.end is done with, and removes fully
// acknowledged segments.
func (p *Pusher) ack(b batch) error {
	p.dmu.Lock()
	p.acked = max(p.acked, b.end)
	acked := p.acked
	p.dmu.Unlock()
	if err := writeCursor(p.cfg.Dir, acked); err != nil {
		p.setErr(err)
		p.log.Error("tsdbpush: cursor write failed (lines may be resent after a restart)", "err", err)
	}
	p.wmu.Lock() // p.cur is the writer's
	p.dmu.Lock()
	p.removeAcked()
	p.dmu.Unlock()
	p.wmu.Unlock()
	return nil
}

// Close flushes staged lines to disk, writes the cursor and closes the
// backlog. Call it after Run has returned; Append returns ErrClosed after.
func (p *Pusher) Close() error {
	p.mu.Lock()
	if p.closed {
		p.mu.Unlock()
		return nil
	}
	p.closed = true
	p.mu.Unlock()
	err := p.flush()
	p.wmu.Lock()
	if p.cur != nil {
		if cerr := p.cur.Close(); cerr != nil && err == nil {
			err = fmt.Errorf("tsdbpush: %w", cerr)
		}
		p.cur = nil
	}
	p.wmu.Unlock()
	p.dmu.Lock()
	acked := p.acked
	p.dmu.Unlock()
	if cerr := writeCursor(p.cfg.Dir, acked); cerr != nil && err == nil {
		err = cerr
	}
	return err
}

func sleepCtx(ctx context.Context, d time.Duration) error {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-t.C:
		return nil
	}
}

func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return fmt.Errorf("tsdbpush: %w", err)
	}
	defer d.Close()
	if err := d.Sync(); err != nil {
		return fmt.Errorf("tsdbpush: fsync %s: %w", dir, err)
	}
	return nil
}

// cutTorn cuts a segment after its last newline, the way the recorder
// recovers its own files (reading only the tail), and returns the size kept.
func cutTorn(path string) (int64, error) {
	st, err := os.Stat(path)
	if err != nil {
		return 0, fmt.Errorf("tsdbpush: %w", err)
	}
	cut, err := record.CutTornTail(path)
	if err != nil {
		return 0, fmt.Errorf("tsdbpush: cut torn tail: %w", err)
	}
	return st.Size() - cut, nil
}

// cutAt truncates a segment to the whole lines within its first n bytes.
func cutAt(path string, n int64) (int64, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return 0, fmt.Errorf("tsdbpush: %w", err)
	}
	keep := int64(wholeLen(b[:min(int64(len(b)), max(n, 0))]))
	if err := os.Truncate(path, keep); err != nil {
		return 0, fmt.Errorf("tsdbpush: cut %s: %w", path, err)
	}
	return keep, nil
}

// writeCursor replaces the cursor file atomically.
func writeCursor(dir string, acked int64) error {
	tmp := filepath.Join(dir, "cursor.tmp")
	f, err := os.Create(tmp)
	if err != nil {
		return fmt.Errorf("tsdbpush: cursor: %w", err)
	}
	if _, err := f.Write(formatCursor(acked)); err != nil {
		f.Close()
		return fmt.Errorf("tsdbpush: cursor: %w", err)
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return fmt.Errorf("tsdbpush: cursor: %w", err)
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("tsdbpush: cursor: %w", err)
	}
	if err := os.Rename(tmp, filepath.Join(dir, "cursor")); err != nil {
		return fmt.Errorf("tsdbpush: cursor: %w", err)
	}
	return syncDir(dir)
}

// parseRetryAfter reads a Retry-After value: delay seconds or an HTTP date.
func parseRetryAfter(v string, now time.Time) (time.Duration, bool) {
	if v == "" {
		return 0, false
	}
	if n, err := strconv.ParseInt(v, 10, 64); err == nil {
		if n < 0 {
			return 0, false
		}
		return time.Duration(min(n, 1<<31)) * time.Second, true
	}
	if t, err := http.ParseTime(v); err == nil {
		return max(t.Sub(now), 0), true
	}
	return 0, false
}
