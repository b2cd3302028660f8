package record

import (
	"compress/gzip"
	"context"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/durable"
)

// Compressed segments. A data file the recorder has closed (at a rotation,
// and the last one when the run ends) is compressed in the background into
// <n>.lp.gz, crash-safely:
//
//  1. <n>.lp.gz.tmp is written and fsynced,
//  2. it is renamed to <n>.lp.gz and the directory is fsynced,
//  3. <n>.lp is removed and the directory is fsynced.
//
// A cut between 1 and 2 leaves a .tmp, which RecoverCompression removes; a
// cut between 2 and 3 leaves <n>.lp and a complete <n>.lp.gz, which
// RecoverCompression resolves (the .lp is removed once the .lp.gz is read
// back equal to it, else the .lp.gz is removed). Readers take the .lp.gz of
// such a pair (DataFiles). A failed compression leaves the .lp in place,
// readable as before. Steps 1 and 2 are pipeline/durable's Write.

// DefaultGzipLevel is the level segments are compressed with: 60 s of the
// demo's data (136 bytes a point written) takes 8.2 bytes a point at level
// 6 against 11.1 at level 1 and 7.1 at level 9, and level 9 takes ten
// times level 6's time (BenchmarkDemoBytesPerPoint in cmd/plenum).
const DefaultGzipLevel = gzip.DefaultCompression

// DataFiles returns the data files of a run directory in recorded order:
// 0001.lp or 0001.lp.gz, 0002.lp…, one per segment. Where a segment is
// there twice (a compression cut before it removed the .lp), the .lp.gz is
// taken: it is complete once it has its name, and it is never removed.
// Files being written (.tmp) are left out.
func DataFiles(dir string) ([]string, error) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		return nil, err
	}
	seen := map[string]string{}
	for _, e := range ents {
		n := e.Name()
		switch {
		case strings.HasSuffix(n, ".lp.gz"):
			seen[strings.TrimSuffix(n, ".lp.gz")] = n
		case strings.HasSuffix(n, ".lp"):
			if _, ok := seen[strings.TrimSuffix(n, ".lp")]; !ok {
				seen[strings.TrimSuffix(n, ".lp")] = n
			}
		}
	}
	stems := make([]string, 0, len(seen))
	for s := range seen {
		stems = append(stems, s)
	}
	sort.Strings(stems)
	out := make([]string, len(stems))
	for i, s := range stems {
		out[i] = filepath.Join(dir, seen[s])
	}
	return out, nil
}

// CompressSegment compresses one closed data file (<n>.lp) into <n>.lp.gz
// crash-safely (see above) at the given gzip level (0: DefaultGzipLevel),
// and removes the .lp.
// A segment already compressed (no .lp left) is not an error. On any error
// the .lp is left in place and the .tmp removed. ctx ends a compression
// in progress (the .lp stays).
func CompressSegment(ctx context.Context, path string, level int) error {
	if !strings.HasSuffix(path, ".lp") {
		return fmt.Errorf("record: compress %s: not a .lp data file", path)
	}
	in, err := os.Open(path)
	if errors.Is(err, os.ErrNotExist) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("record: compress: %w", err)
	}
	defer in.Close()
	if level == 0 {
		level = DefaultGzipLevel
	}
	gzPath := path + ".gz"
	if err := durable.Write(gzPath, 0o644, func(w io.Writer) error { return writeGzip(ctx, w, in, level) }); err != nil {
		return fmt.Errorf("record: compress %s: %w", path, err) // after the rename, both are there: recovery resolves
	}
	if err := os.Remove(path); err != nil {
		return fmt.Errorf("record: compress %s: %w", path, err)
	}
	if err := durable.SyncDir(filepath.Dir(path)); err != nil {
		return fmt.Errorf("record: compress %s: %w", path, err)
	}
	return nil
}

// writeGzip compresses src into w at level; ctx ends it between reads.
func writeGzip(ctx context.Context, w io.Writer, src io.Reader, level int) error {
	zw, err := gzip.NewWriterLevel(w, level)
	if err != nil {
		return err
	}
	buf := make([]byte, 256<<10)
	for {
		if err := ctx.Err(); err != nil {
			return err
		}
		n, rerr := src.Read(buf)
		if n > 0 {
			if _, err := zw.Write(buf[:n]); err != nil {
				return err
			}
		}
		if rerr == io.EOF {
			break
		}
		if rerr != nil {
			return rerr
		}
	}
	return zw.Close()
}

// RunDirs returns the run directories under dir, in name order: its
// subdirectories, less those whose name starts with a dot (a run being
// removed). A dir that does not exist holds none.
func RunDirs(dir string) ([]string, error) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, nil
		}
		return nil, fmt.Errorf("record: %w", err)
	}
	var out []string
	for _, e := range ents {
		if e.IsDir() && !strings.HasPrefix(e.Name(), ".") {
			out = append(out, filepath.Join(dir, e.Name()))
		}
	}
	return out, nil
}

// CompressRecovered says what RecoverCompression did in one run directory.
type CompressRecovered struct {
	Path   string // the file acted on
	Action string // "removed_tmp", "removed_lp" (the .lp.gz was complete), "removed_bad_gz"
}

// RecoverCompression finishes what a cut left of compressions in the run
// directories under dir: a leftover .lp.gz.tmp is removed; where <n>.lp and
// <n>.lp.gz are both present, the .lp is removed when the .lp.gz reads back
// to the same bytes, else the .lp.gz is removed (the .lp is compressed
// again later).
func RecoverCompression(dir string) ([]CompressRecovered, error) {
	runs, err := RunDirs(dir)
	if err != nil {
		return nil, err
	}
	var out []CompressRecovered
	var errs []error
	for _, rd := range runs {
		tmps, _ := filepath.Glob(filepath.Join(rd, "*.lp.gz.tmp"))
		for _, t := range tmps {
			if err := os.Remove(t); err != nil {
				errs = append(errs, fmt.Errorf("record: %w", err))
				continue
			}
			out = append(out, CompressRecovered{Path: t, Action: "removed_tmp"})
		}
		gzs, _ := filepath.Glob(filepath.Join(rd, "*.lp.gz"))
		for _, gz := range gzs {
			lp := strings.TrimSuffix(gz, ".gz")
			if !exists(lp) {
				continue
			}
			same, err := sameContent(lp, gz)
			if err != nil && !errors.Is(err, errGzipBad) {
				errs = append(errs, fmt.Errorf("record: %s: %w", lp, err))
				continue
			}
			victim, action := lp, "removed_lp"
			if !same {
				victim, action = gz, "removed_bad_gz"
			}
			if err := os.Remove(victim); err != nil {
				errs = append(errs, fmt.Errorf("record: %w", err))
				continue
			}
			out = append(out, CompressRecovered{Path: victim, Action: action})
		}
		if len(tmps) > 0 || len(gzs) > 0 {
			if err := durable.SyncDir(rd); err != nil {
				errs = append(errs, fmt.Errorf("record: %s: %w", rd, err))
			}
		}
	}
	return out, errors.Join(errs...)
}

var errGzipBad = errors.New("gzip file unreadable")

// sameContent reports whether the gzip file gz holds exactly the bytes of lp.
func sameContent(lp, gz string) (bool, error) {
	sumLP, nLP, err := crcOf(lp, false)
	if err != nil {
		return false, err
	}
	sumGZ, nGZ, err := crcOf(gz, true)
	if err != nil {
		return false, fmt.Errorf("%w: %v", errGzipBad, err)
	}
	return sumLP == sumGZ && nLP == nGZ, nil
}

func crcOf(path string, gz bool) (uint32, int64, error) {
	f, err := os.Open(path)
	if err != nil {
		return 0, 0, err
	}
	defer f.Close()
	var r io.Reader = f
	if gz {
		zr, err := gzip.NewReader(f)
		if err != nil {
			return 0, 0, err
		}
		r = zr
	}
	h := crc32.NewIEEE()
	n, err := io.Copy(h, r)
	return h.Sum32(), n, err
}

// CompressorConfig configures a Compressor.
type CompressorConfig struct {
	// Dir is the record directory; its closed segments are looked for at
	// the start and at every rescan. Empty: only enqueued files.
	Dir string
	// Level is the gzip level; 0: DefaultGzipLevel.
	Level int
	// Queue bounds the segments waiting; 0: 64. A segment that does not
	// fit is found again by the next rescan.
	Queue int
	// RescanEvery is how often Dir is looked through for closed segments
	// left uncompressed (a failure, a full queue); 0: 10 minutes.
	RescanEvery time.Duration
	// After is the clock of the rescans; nil: time.After.
	After func(time.Duration) <-chan time.Time
	// Drain bounds the work done after Run's context ends, so that the
	// run that ended with the shutdown is compressed now; 0: 3 s. What is
	// left is compressed at the next start.
	Drain time.Duration
	// Log receives failures; nil: discarded.
	Log *slog.Logger
}

// Compressor compresses closed segments in the background. Closed never
// blocks; Run does the work. Its methods are safe for concurrent use.
type Compressor struct {
	cfg  CompressorConfig
	q    chan string
	kick chan struct{}

	mu      sync.Mutex
	pending map[string]bool

	done, failed, dropped atomic.Uint64
	bytesIn, bytesOut     atomic.Uint64
	failing               atomic.Bool // the last compression failed
}

// NewCompressor returns a compressor; nothing happens until Run.
func NewCompressor(cfg CompressorConfig) *Compressor {
	if cfg.Level == 0 {
		cfg.Level = DefaultGzipLevel
	}
	if cfg.Queue <= 0 {
		cfg.Queue = 64
	}
	if cfg.RescanEvery <= 0 {
		cfg.RescanEvery = 10 * time.Minute
	}
	if cfg.After == nil {
		cfg.After = time.After
	}
	if cfg.Drain <= 0 {
		cfg.Drain = 3 * time.Second
	}
	if cfg.Log == nil {
		cfg.Log = slog.New(slog.DiscardHandler)
	}
	return &Compressor{cfg: cfg, q: make(chan string, cfg.Queue), kick: make(chan struct{}, 1), pending: map[string]bool{}}
}

// Closed takes the path of a data file the recorder closed, for
// compression; it never blocks (a full queue leaves the file to the next
// rescan, counted). It fits Config.Closed.
func (c *Compressor) Closed(path string) {
	c.mu.Lock()
	if c.pending[path] {
		c.mu.Unlock()
		return
	}
	c.pending[path] = true
	c.mu.Unlock()
	select {
	case c.q <- path:
	default:
		c.mu.Lock()
		delete(c.pending, path)
		c.mu.Unlock()
		c.dropped.Add(1)
	}
}

// Rescan asks Run to look through Dir for closed segments now.
func (c *Compressor) Rescan() {
	select {
	case c.kick <- struct{}{}:
	default:
	}
}

// ClosedSegments returns the data files under dir that no recorder writes
// to: every .lp of a run that has ended (normally or not), and every .lp
// but the last of a run still being recorded.
func ClosedSegments(dir string) ([]string, error) {
	runs, err := RunDirs(dir)
	if err != nil {
		return nil, err
	}
	var out []string
	for _, rd := range runs {
		lps, _ := filepath.Glob(filepath.Join(rd, "*.lp"))
		sort.Strings(lps)
		ended := exists(filepath.Join(rd, "ended")) || exists(filepath.Join(rd, "ended_abnormally"))
		if !ended && len(lps) > 0 {
			// The last one is being written: only segments before the
			// highest-numbered one are closed.
			all, _ := DataFiles(rd)
			if len(all) > 0 && all[len(all)-1] == lps[len(lps)-1] {
				lps = lps[:len(lps)-1]
			}
		}
		out = append(out, lps...)
	}
	return out, nil
}

// Run compresses what Closed and the rescans find until ctx ends, then
// goes on for at most Config.Drain with what is queued (the segment the
// shutdown closed last). It returns nil.
func (c *Compressor) Run(ctx context.Context) error {
	// Work goes on past ctx by the drain: a compression under way when
	// ctx ends is finished, not thrown away.
	wctx, stopWork := context.WithCancel(context.WithoutCancel(ctx))
	defer stopWork()
	var timer atomic.Pointer[time.Timer]
	stopAfter := context.AfterFunc(ctx, func() { timer.Store(time.AfterFunc(c.cfg.Drain, stopWork)) })
	defer func() {
		stopAfter()
		if t := timer.Load(); t != nil {
			t.Stop()
		}
	}()
	c.rescan()
	for {
		select {
		case <-ctx.Done():
			c.drain(wctx)
			return nil
		case p := <-c.q:
			c.compress(wctx, p)
		case <-c.kick:
			c.rescan()
		case <-c.cfg.After(c.cfg.RescanEvery):
			c.rescan()
		}
	}
}

// drain compresses what is queued until ctx ends.
func (c *Compressor) drain(ctx context.Context) {
	for ctx.Err() == nil {
		select {
		case p := <-c.q:
			c.compress(ctx, p)
		default:
			return
		}
	}
	if n := len(c.q); n > 0 || ctx.Err() != nil {
		c.cfg.Log.Warn("record: stopping with closed segments not yet compressed; they are compressed at the next start", "queued", n)
	}
}

func (c *Compressor) rescan() {
	if c.cfg.Dir == "" {
		return
	}
	segs, err := ClosedSegments(c.cfg.Dir)
	if err != nil && !errors.Is(err, os.ErrNotExist) {
		c.failed.Add(1)
		c.cfg.Log.Error("record: looking for segments to compress", "dir", c.cfg.Dir, "err", err)
		return
	}
	for _, s := range segs {
		c.Closed(s)
	}
}

func (c *Compressor) compress(ctx context.Context, path string) {
	defer func() {
		c.mu.Lock()
		delete(c.pending, path)
		c.mu.Unlock()
	}()
	st, err := os.Stat(path)
	if errors.Is(err, os.ErrNotExist) {
		return
	}
	if err := CompressSegment(ctx, path, c.cfg.Level); err != nil {
		if ctx.Err() != nil {
			return // stopped: the next start compresses it
		}
		c.failed.Add(1)
		c.failing.Store(true)
		c.cfg.Log.Error("record: compressing a closed segment failed; it stays uncompressed and readable, and is tried again later", "file", path, "err", err)
		return
	}
	c.done.Add(1)
	c.failing.Store(false)
	if st != nil {
		c.bytesIn.Add(uint64(st.Size()))
	}
	if gz, err := os.Stat(path + ".gz"); err == nil {
		c.bytesOut.Add(uint64(gz.Size()))
	}
}

// Report says how compression is doing: Kind "compressor"; counters
// compressed_segments, failures (compressions and rescans that failed),
// queue_full (segments left to a rescan), bytes_in and bytes_out; the gauge
// queued_segments. Up while no compression has failed since the last one
// that worked.
func (c *Compressor) Report() pipeline.HealthReport {
	return pipeline.HealthReport{
		Kind: "compressor",
		Name: "record",
		Up:   !c.failing.Load(),
		Counters: []pipeline.NamedCount{
			{Name: "compressed_segments", Value: c.done.Load()},
			{Name: "failures", Value: c.failed.Load()},
			{Name: "queue_full", Value: c.dropped.Load()},
			{Name: "bytes_in", Value: c.bytesIn.Load()},
			{Name: "bytes_out", Value: c.bytesOut.Load()},
		},
		Gauges: []pipeline.NamedValue{{Name: "queued_segments", Value: float64(len(c.q))}},
	}
}

// PushedFile is the marker a run gets once the push target has
// acknowledged its lines (MarkPushed): "complete" when every line was
// acknowledged, "incomplete" when the pusher dropped some unsent.
const PushedFile = "pushed"

// MarkPushed writes the run directory's pushed marker, synced. A marker
// already there is replaced; a run directory that is gone (removed) needs
// none.
func MarkPushed(runDir string, complete bool) error {
	if _, err := os.Stat(filepath.Join(runDir, "run.json")); errors.Is(err, os.ErrNotExist) {
		return nil
	}
	text := "complete\n"
	if !complete {
		text = "incomplete: the pusher dropped lines of this run unsent\n"
	}
	return writeSynced(filepath.Join(runDir, PushedFile), []byte(text))
}

// Pushed reports whether the run directory has a pushed marker and whether
// it says every line was acknowledged.
func Pushed(runDir string) (marked, complete bool) {
	b, err := os.ReadFile(filepath.Join(runDir, PushedFile))
	if err != nil {
		return false, false
	}
	return true, strings.HasPrefix(string(b), "complete")
}
