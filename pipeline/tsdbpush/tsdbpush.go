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
// files and POSTs them. When Run's context ends (a shutdown) the writer
// flushes what is staged and the sender goes on for at most Config.Drain
// until the backlog is empty; what the server has not taken by then stays
// on disk for the next start, and the log says how much.
//
// # Backlog layout
//
//	<Dir>/seg-<offset>.lp   segment files; <offset> is the 20-digit logical
//	                        byte offset of the segment's first byte in the
//	                        stream of all lines ever appended
//	<Dir>/cursor            "tsdbpush cursor v1 acked=<offset> crc=<crc32>\n":
//	                        every byte before <offset> was accepted (2xx)
//	<Dir>/rejected/<offset>.lp  batches the server refused as malformed
//	<Dir>/marks             runs whose end is in the backlog, not yet told
//	                        pushed (Mark, Config.OnPushed; see marks.go)
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
//
// # Parts and locks
//
// Three parts, one concern each: staging (staging.go: what Append copies
// into; one mutex, held only to copy or swap chunk lists), the backlog
// (package backlog: segments, cursor, bound, torn-tail cut; no network; one
// mutex for the segment list and offsets shared by its writer and reader
// sides) and the sender (sender.go: batching, HTTP, backoff, answers;
// atomics only). The writer side is owned by whoever holds the running
// token: Run's writer goroutine and then Run's last flush, or Close.
package tsdbpush

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"net/url"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/tsdbpush/backlog"
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
	// Drain is how long Run goes on sending after its context ends (a
	// shutdown), so that what was recorded last reaches the server now
	// rather than at the next start; a request still in flight at its end
	// is cut off, and what is left is logged and stays in the backlog for
	// the next start. Default 3 s (inside the daemon's 5 s shutdown grace);
	// negative: no drain, only a request in flight is given 2 s.
	Drain time.Duration
	// OnPushed, when set, is told the name of each Mark once every line
	// appended before it has been acknowledged by the server (complete),
	// or has been acknowledged or dropped unsent (complete false). It is
	// called from Run's writer, at most every FlushEvery; an error keeps
	// the mark for the next call.
	OnPushed func(name string, complete bool) error
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

// ErrClosed is returned by Append and Run after Close.
var ErrClosed = errors.New("tsdbpush: closed")

// Pusher is a backlog and its sender. Append, Stats, Report and Close are
// safe for concurrent use; Run runs at most once at a time, and not while
// Close runs.
type Pusher struct {
	cfg   Config
	log   *slog.Logger
	stage staging
	disk  *backlog.Backlog
	send  *sender

	// running is held by Run, or by Close: whoever holds it owns the
	// writer side of the backlog, so flushes never overlap.
	running atomic.Bool
	kick    chan struct{} // staging has a batch's worth
	ready   chan struct{} // new bytes on disk

	marks                  *marks
	flushing               atomic.Int64 // bytes taken from staging, not yet on disk
	appLines, appBytes     atomic.Uint64
	stageDropL, stageDropB atomic.Uint64
	errs                   lastError
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
	if cfg.Logger == nil {
		cfg.Logger = slog.Default()
	}
	if cfg.HTTPClient == nil {
		cfg.HTTPClient = &http.Client{}
	}
	if cfg.Sleep == nil {
		cfg.Sleep = sleepCtx
	}
	if cfg.Drain == 0 {
		cfg.Drain = 3 * time.Second
	}
	disk, err := backlog.Open(backlog.Config{
		Dir: cfg.Dir, MaxBytes: cfg.MaxBacklogBytes, SegmentBytes: cfg.SegmentBytes, Logger: cfg.Logger,
	})
	if err != nil {
		return nil, fmt.Errorf("tsdbpush: %w", err)
	}
	_, next := disk.Offsets()
	mk, err := loadMarks(cfg.Dir, next)
	if err != nil {
		disk.Close()
		return nil, err
	}
	p := &Pusher{
		cfg:   cfg,
		log:   cfg.Logger,
		disk:  disk,
		marks: mk,
		kick:  make(chan struct{}, 1),
		ready: make(chan struct{}, 1),
	}
	// Staging holds what the writer has not yet put on disk: enough for a
	// few seconds of a slow disk, never more than the backlog itself.
	p.stage.limit = int(min(cfg.MaxBacklogBytes, 64<<20))
	p.send = &sender{
		cfg: cfg, client: cfg.HTTPClient, sleep: cfg.Sleep, log: cfg.Logger,
		q: disk, ready: p.ready, errs: &p.errs,
	}
	return p, nil
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
	res, staged := p.stage.put(lines)
	switch res {
	case putClosed:
		return ErrClosed
	case putFull:
		p.marks.dropped()
		p.stageDropL.Add(n)
		p.stageDropB.Add(uint64(len(lines)))
		return nil
	}
	p.appLines.Add(n)
	p.appBytes.Add(uint64(len(lines)))
	if staged >= p.cfg.BatchBytes {
		select {
		case p.kick <- struct{}{}:
		default:
		}
	}
	return nil
}

// Stats returns the counters.
func (p *Pusher) Stats() Stats {
	staged := int64(p.stage.size())
	ds := p.disk.Stats()
	le, at := p.errs.get()
	s := p.send
	return Stats{
		AppendedLines: p.appLines.Load(), AppendedBytes: p.appBytes.Load(),
		SentLines: s.sentLines.Load(), SentBytes: s.sentBytes.Load(),
		Batches: s.batches.Load(), Retries: s.retries.Load(),
		RejectedBatches: s.rejB.Load(), RejectedLines: s.rejL.Load(), RejectedBytes: s.rejBytes.Load(),
		DroppedLines:    p.stageDropL.Load() + ds.DroppedLines,
		DroppedBytes:    p.stageDropB.Load() + ds.DroppedBytes,
		DroppedSegments: ds.DroppedSegments,
		BacklogBytes:    ds.PendingBytes + staged + p.flushing.Load(),
		LastError:       le, LastErrorAt: at,
	}
}

// Report is the pusher's health for the metrics collector: Kind and Name
// "push"; Up while the last request was answered (accepted, or refused for
// its content and set aside) or there is nothing to send, down while
// requests fail and are retried; the counters sent_lines, retries,
// rejected_lines and dropped_lines and the gauge backlog_bytes, with the
// values Stats gives.
func (p *Pusher) Report() pipeline.HealthReport {
	st := p.Stats()
	return pipeline.HealthReport{
		Kind: "push",
		Name: "push",
		Up:   !p.send.failing.Load() || st.BacklogBytes == 0,
		Counters: []pipeline.NamedCount{
			{Name: "sent_lines", Value: st.SentLines},
			{Name: "retries", Value: st.Retries},
			{Name: "rejected_lines", Value: st.RejectedLines},
			{Name: "dropped_lines", Value: st.DroppedLines},
		},
		Gauges: []pipeline.NamedValue{
			{Name: "backlog_bytes", Value: float64(st.BacklogBytes)},
		},
	}
}

// Run writes staged lines to disk and sends the backlog until ctx is done.
// It then flushes what is staged to disk and goes on sending for at most
// Config.Drain, until the backlog is empty; what the server did not take by
// then is logged and stays on disk for the next start. It returns nil, or
// the error of the last flush. Sending failures never end Run; they are
// retried, counted and reported in Stats.
func (p *Pusher) Run(ctx context.Context) error {
	if !p.running.CompareAndSwap(false, true) {
		if p.stage.isClosed() {
			return ErrClosed
		}
		return errors.New("tsdbpush: Run is already running")
	}
	defer p.running.Store(false)
	// The sender's context outlives ctx by the drain (or, without one, by
	// the grace of a request in flight).
	grace := p.cfg.Drain
	if grace < 0 {
		grace = inFlightGrace
	}
	sctx, stopSending := context.WithCancel(context.WithoutCancel(ctx))
	defer stopSending()
	var timer atomic.Pointer[time.Timer]
	stopAfter := context.AfterFunc(ctx, func() { timer.Store(time.AfterFunc(grace, stopSending)) })
	defer func() {
		stopAfter()
		if t := timer.Load(); t != nil {
			t.Stop()
		}
	}()
	flushed := make(chan struct{}) // closed after the last flush
	var flushErr error
	go func() {
		defer close(flushed)
		flushErr = p.writeLoop(ctx)
	}()
	before := p.send.sentBytes.Load()
	p.send.run(ctx, sctx, flushed, p.cfg.Drain > 0)
	<-flushed
	p.settle()
	p.reportDrain(ctx, before)
	return flushErr
}

// reportDrain logs, after a shutdown, what the drain sent and what is left.
func (p *Pusher) reportDrain(ctx context.Context, sentBefore uint64) {
	if ctx.Err() == nil {
		return
	}
	st := p.Stats()
	if st.BacklogBytes > 0 {
		args := []any{"unsent_bytes", st.BacklogBytes, "dir", p.cfg.Dir, "waited", max(p.cfg.Drain, 0)}
		if st.LastError != "" {
			args = append(args, "last_error", st.LastError)
		}
		p.log.Warn("tsdbpush: stopping with lines the server has not taken; they stay in the backlog and are sent at the next start", args...)
		return
	}
	if sent := p.send.sentBytes.Load() - sentBefore; sent > 0 {
		p.log.Info("tsdbpush: every recorded line was sent before stopping")
	}
}

// writeLoop moves staged lines to disk until ctx is done, then flushes once
// more and returns the error of that last flush.
func (p *Pusher) writeLoop(ctx context.Context) error {
	t := time.NewTicker(p.cfg.FlushEvery)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return p.flush()
		case <-p.kick:
		case <-t.C:
		}
		if err := p.flush(); err != nil {
			p.log.Error("tsdbpush: backlog write failed", "err", err)
		}
		p.settle()
	}
}

// settle tells Config.OnPushed of the marks the server has acknowledged.
func (p *Pusher) settle() {
	acked, _ := p.disk.Offsets()
	if err := p.marks.settle(acked, p.cfg.OnPushed); err != nil {
		p.log.Error("tsdbpush: telling that a run was pushed failed; told again later", "err", err)
	}
}

// flush moves the staged lines into the backlog and fsyncs. Only the holder
// of the running token calls it (or a test, with Run not running).
func (p *Pusher) flush() error {
	chunks, n, dropped := p.stage.take()
	p.flushing.Store(int64(n))
	if dropped {
		p.log.Warn("tsdbpush: staging full, lines dropped (disk too slow or Run not running)",
			"dropped_lines_total", p.Stats().DroppedLines)
		p.errs.set(errors.New("tsdbpush: staging full, lines dropped"))
	}
	var err error
	lost := false
	for _, c := range chunks {
		werr := p.disk.Write(c)
		p.flushing.Add(-int64(len(c)))
		if werr != nil {
			lost = true
			if err == nil {
				err = fmt.Errorf("tsdbpush: backlog write: %w", werr)
			}
		}
	}
	d, serr := p.disk.Sync()
	if serr != nil && err == nil {
		err = fmt.Errorf("tsdbpush: %w", serr)
	}
	if lost {
		p.marks.dropped() // lines of the pending marks may be among those lost
	}
	_, next := p.disk.Offsets()
	if merr := p.marks.flushed(n, next, d.From, d.To); merr != nil {
		p.log.Error("tsdbpush: writing the marks failed; the runs they name are told pushed only once written", "err", merr)
	}
	if d.Segments > 0 {
		p.errs.set(fmt.Errorf("tsdbpush: backlog full, dropped %d unsent bytes of %s", d.Bytes, d.LastSegment))
	}
	p.flushing.Store(0)
	p.stage.recycle(chunks)
	if err != nil {
		p.errs.set(err)
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

// Close flushes staged lines to disk, writes the cursor and closes the
// backlog. Call it after Run has returned; Append returns ErrClosed after.
func (p *Pusher) Close() error {
	if !p.stage.close() {
		return nil
	}
	if !p.running.CompareAndSwap(false, true) {
		// Run is still going: its last flush writes what is staged.
		return errors.New("tsdbpush: Close while Run is running; Run's last flush keeps the staged lines")
	}
	// The token stays held: a Run after Close would have nothing to do.
	err := p.flush()
	if cerr := p.disk.Close(); cerr != nil && err == nil {
		err = fmt.Errorf("tsdbpush: %w", cerr)
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
