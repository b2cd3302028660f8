package tsdbpush

import (
	"bytes"
	"compress/gzip"
	"context"
	"fmt"
	"hash/crc32"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// sink is a write endpoint that records every line it accepts. answer
// decides the status of request n (0-based) from its body; nil accepts.
type sink struct {
	t      *testing.T
	mu     sync.Mutex
	lines  []string
	bodies [][]byte
	reqs   int
	hdrs   []http.Header
	answer func(n int, body []byte, w http.ResponseWriter) int
	srv    *httptest.Server
}

func newSink(t *testing.T, answer func(n int, body []byte, w http.ResponseWriter) int) *sink {
	s := &sink{t: t, answer: answer}
	s.srv = httptest.NewServer(http.HandlerFunc(s.serve))
	t.Cleanup(s.srv.Close)
	return s
}

func (s *sink) serve(w http.ResponseWriter, r *http.Request) {
	var rd io.Reader = r.Body
	if r.Header.Get("Content-Encoding") == "gzip" {
		zr, err := gzip.NewReader(r.Body)
		if err != nil {
			http.Error(w, err.Error(), 400)
			return
		}
		rd = zr
	}
	body, err := io.ReadAll(rd)
	if err != nil {
		http.Error(w, err.Error(), 400)
		return
	}
	s.mu.Lock()
	n := s.reqs
	s.reqs++
	s.hdrs = append(s.hdrs, r.Header.Clone())
	answer := s.answer
	s.mu.Unlock()
	code := http.StatusNoContent
	if answer != nil {
		code = answer(n, body, w)
	}
	if code == -1 { // drop the connection without an answer
		hj, _ := w.(http.Hijacker)
		c, _, _ := hj.Hijack()
		c.Close()
		return
	}
	if code/100 == 2 {
		s.mu.Lock()
		s.bodies = append(s.bodies, body)
		for _, l := range strings.SplitAfter(string(body), "\n") {
			if l != "" {
				s.lines = append(s.lines, l)
			}
		}
		s.mu.Unlock()
	}
	w.WriteHeader(code)
}

func (s *sink) url() string { return s.srv.URL + "/write?db=plenum&precision=ns" }

func (s *sink) got() []string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]string(nil), s.lines...)
}

func (s *sink) setAnswer(a func(n int, body []byte, w http.ResponseWriter) int) {
	s.mu.Lock()
	s.answer = a
	s.mu.Unlock()
}

// genLines makes n distinct recorder-shaped lines of about 110 bytes with
// timestamps from ts0 on, 1 ms apart.
func genLines(n int, ts0 int64) []string {
	out := make([]string, n)
	for i := range out {
		out[i] = fmt.Sprintf("plenum,channel=boost_pressure,run=R1,source=mcu,vehicle=v1 value=%d.%03d,quality=\"ok\" %d\n",
			101000+i%997, i%1000, ts0+int64(i)*1e6)
	}
	return out
}

func testConfig(t *testing.T, url string) Config {
	return Config{
		URL:        url,
		Dir:        t.TempDir(),
		FlushEvery: 10 * time.Millisecond,
		Drain:      300 * time.Millisecond,
		MinBackoff: time.Millisecond,
		MaxBackoff: 5 * time.Millisecond,
		Timeout:    5 * time.Second,
		Logger:     slog.New(slog.NewTextHandler(io.Discard, nil)),
	}
}

// running starts Run and returns a function that stops it and checks its
// error.
func running(t *testing.T, p *Pusher) func() {
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	return func() {
		cancel()
		if err := <-done; err != nil {
			t.Errorf("Run: %v", err)
		}
	}
}

func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(2 * time.Millisecond)
	}
}

func appendAll(t *testing.T, p *Pusher, lines []string, chunk int) {
	t.Helper()
	for i := 0; i < len(lines); i += chunk {
		var b []byte
		for _, l := range lines[i:min(i+chunk, len(lines))] {
			b = append(b, l...)
		}
		if err := p.Append(b); err != nil {
			t.Fatal(err)
		}
	}
}

// exactlyOnceInOrder checks got is want: every line once, in order, with a
// count per timestamp for a clear message.
func exactlyOnceInOrder(t *testing.T, got, want []string) {
	t.Helper()
	seen := map[string]int{}
	for _, l := range got {
		f := strings.Fields(l)
		seen[f[len(f)-1]]++
	}
	for ts, n := range seen {
		if n != 1 {
			t.Errorf("timestamp %s arrived %d times", ts, n)
			break
		}
	}
	if len(got) != len(want) {
		t.Fatalf("got %d lines, want %d", len(got), len(want))
	}
	for i := range want {
		if got[i] != want[i] {
			t.Fatalf("line %d: got %q, want %q", i, got[i], want[i])
		}
	}
}

func TestBatching(t *testing.T) {
	cases := []struct {
		name       string
		n          int
		batchLines int
		batchBytes int
		gzip       bool
		token      string
		user, pass string
	}{
		{name: "by lines", n: 10000, batchLines: 1000},
		{name: "by bytes", n: 3000, batchBytes: 4096},
		{name: "gzip and token", n: 5000, batchLines: 700, gzip: true, token: "s3cret"},
		{name: "basic auth", n: 2000, batchLines: 300, user: "shop", pass: "pw"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := newSink(t, nil)
			cfg := testConfig(t, s.url())
			cfg.BatchLines, cfg.BatchBytes, cfg.Gzip = c.batchLines, c.batchBytes, c.gzip
			cfg.Token, cfg.Username, cfg.Password = c.token, c.user, c.pass
			p, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			stop := running(t, p)
			want := genLines(c.n, 1700000000000000000)
			appendAll(t, p, want, 37)
			waitFor(t, "all lines", func() bool { return p.Stats().SentLines == uint64(c.n) })
			stop()
			if err := p.Close(); err != nil {
				t.Fatal(err)
			}
			exactlyOnceInOrder(t, s.got(), want)
			s.mu.Lock()
			defer s.mu.Unlock()
			for i, b := range s.bodies {
				if n := bytes.Count(b, []byte{'\n'}); c.batchLines > 0 && n > c.batchLines {
					t.Errorf("request %d: %d lines, limit %d", i, n, c.batchLines)
				}
				if c.batchBytes > 0 && len(b) > c.batchBytes {
					t.Errorf("request %d: %d bytes, limit %d", i, len(b), c.batchBytes)
				}
			}
			minReq := c.n / max(c.batchLines, 1)
			if c.batchBytes > 0 {
				minReq = c.n * 100 / c.batchBytes
			}
			if len(s.bodies) < minReq {
				t.Errorf("%d requests, want at least %d", len(s.bodies), minReq)
			}
			h := s.hdrs[0]
			if got := h.Get("Content-Encoding") == "gzip"; got != c.gzip {
				t.Errorf("gzip header %v, want %v", got, c.gzip)
			}
			if c.token != "" && h.Get("Authorization") != "Token "+c.token {
				t.Errorf("Authorization %q", h.Get("Authorization"))
			}
			if c.user != "" {
				req := &http.Request{Header: h}
				u, pw, ok := req.BasicAuth()
				if !ok || u != c.user || pw != c.pass {
					t.Errorf("basic auth %q %q %v", u, pw, ok)
				}
			}
			st := p.Stats()
			if st.SentLines != uint64(c.n) || st.AppendedLines != uint64(c.n) || st.BacklogBytes != 0 {
				t.Errorf("stats %+v", st)
			}
			if st.Batches != uint64(len(s.bodies)) {
				t.Errorf("Batches %d, server saw %d", st.Batches, len(s.bodies))
			}
		})
	}
}

// TestSmallBatchWaitsForFlushInterval: a few lines go out together after
// the flush interval, in one request.
func TestSmallBatchWaitsForFlushInterval(t *testing.T) {
	s := newSink(t, nil)
	cfg := testConfig(t, s.url())
	cfg.FlushEvery = 100 * time.Millisecond
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	want := genLines(3, 1e18)
	appendAll(t, p, want, 3)
	stop := running(t, p)
	defer stop()
	waitFor(t, "3 lines", func() bool { return len(s.got()) == 3 })
	if s.reqs != 1 {
		t.Errorf("%d requests for 3 lines, want 1", s.reqs)
	}
	exactlyOnceInOrder(t, s.got(), want)
}

func TestRetryUntilAccepted(t *testing.T) {
	cases := []struct {
		name  string
		fails int
		code  int // -1 drops the connection
	}{
		{"500 x3", 3, 500},
		{"502 x5", 5, 502},
		{"503 without Retry-After x2", 2, 503},
		{"404 database missing x2", 2, 404},
		{"connection dropped x3", 3, -1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := newSink(t, func(n int, _ []byte, _ http.ResponseWriter) int {
				if n < c.fails {
					return c.code
				}
				return 204
			})
			cfg := testConfig(t, s.url())
			cfg.BatchLines = 500
			p, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			want := genLines(4000, 1700000000000000000)
			appendAll(t, p, want, 100)
			stop := running(t, p)
			waitFor(t, "all lines", func() bool { return len(s.got()) >= len(want) })
			stop()
			p.Close()
			exactlyOnceInOrder(t, s.got(), want)
			st := p.Stats()
			if st.Retries != uint64(c.fails) {
				t.Errorf("Retries %d, want %d", st.Retries, c.fails)
			}
			if st.LastError == "" {
				t.Error("LastError empty after failures")
			}
		})
	}
}

func TestRetryAfter(t *testing.T) {
	cases := []struct {
		name  string
		code  int
		value string
		want  time.Duration
	}{
		{"429 seconds", 429, "7", 7 * time.Second},
		{"503 seconds", 503, "2", 2 * time.Second},
		{"429 http date", 429, "", 0}, // value set below: now+30s
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			value, want := c.value, c.want
			if value == "" {
				value = time.Now().Add(30 * time.Second).UTC().Format(http.TimeFormat)
				want = 30 * time.Second
			}
			s := newSink(t, func(n int, _ []byte, w http.ResponseWriter) int {
				if n == 0 {
					w.Header().Set("Retry-After", value)
					return c.code
				}
				return 204
			})
			cfg := testConfig(t, s.url())
			var mu sync.Mutex
			var waits []time.Duration
			cfg.Sleep = func(ctx context.Context, d time.Duration) error {
				mu.Lock()
				waits = append(waits, d)
				mu.Unlock()
				return sleepCtx(ctx, time.Millisecond)
			}
			p, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			want1 := genLines(10, 1e18)
			appendAll(t, p, want1, 10)
			stop := running(t, p)
			waitFor(t, "lines", func() bool { return len(s.got()) == 10 })
			stop()
			p.Close()
			mu.Lock()
			defer mu.Unlock()
			if len(waits) != 1 {
				t.Fatalf("waits %v, want one", waits)
			}
			// An HTTP date has whole seconds: allow the second it was cut to.
			if waits[0] > want || waits[0] < want-2*time.Second {
				t.Errorf("waited %v, server asked %v", waits[0], want)
			}
		})
	}
}

func TestBackoffGrowsWithJitter(t *testing.T) {
	p := &sender{cfg: Config{MinBackoff: 100 * time.Millisecond, MaxBackoff: 2 * time.Second}}
	for attempt, full := range []time.Duration{100, 200, 400, 800, 1600, 2000, 2000} {
		full *= time.Millisecond
		if attempt == 6 {
			attempt = 40 // no overflow far out
		}
		seen := map[time.Duration]bool{}
		for range 50 {
			d := p.backoff(attempt)
			if d < full/2 || d > full {
				t.Fatalf("attempt %d: %v outside [%v, %v]", attempt, d, full/2, full)
			}
			seen[d] = true
		}
		if len(seen) < 5 {
			t.Errorf("attempt %d: only %d distinct waits: no jitter", attempt, len(seen))
		}
	}
}

func TestRejectedBatchSetAside(t *testing.T) {
	s := newSink(t, func(_ int, body []byte, _ http.ResponseWriter) int {
		if bytes.Contains(body, []byte("malformed")) {
			return 400
		}
		return 204
	})
	cfg := testConfig(t, s.url())
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	stop := running(t, p)
	good1 := genLines(50, 1e18)
	appendAll(t, p, good1, 50)
	waitFor(t, "first lines", func() bool { return len(s.got()) == 50 })
	bad := "plenum,channel=x value=malformed 1\n"
	if err := p.Append([]byte(bad)); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "rejection", func() bool { return p.Stats().RejectedBatches == 1 })
	good2 := genLines(50, 2e18)
	appendAll(t, p, good2, 50)
	waitFor(t, "later lines", func() bool { return len(s.got()) == 100 })
	stop()
	p.Close()
	exactlyOnceInOrder(t, s.got(), append(good1, good2...))
	st := p.Stats()
	if st.RejectedBatches != 1 || st.RejectedLines != 1 || st.RejectedBytes != uint64(len(bad)) {
		t.Errorf("rejected stats %+v", st)
	}
	if !strings.Contains(st.LastError, "400") {
		t.Errorf("LastError %q does not name the 400", st.LastError)
	}
	files, _ := filepath.Glob(filepath.Join(cfg.Dir, "rejected", "*.lp"))
	if len(files) != 1 {
		t.Fatalf("rejected files %v", files)
	}
	b, _ := os.ReadFile(files[0])
	if string(b) != bad {
		t.Errorf("rejected file holds %q", b)
	}
}

// TestRestartWhileServerDown: lines appended while the server is down
// survive a close and reopen and all arrive once the server is back, none
// twice. The second case acknowledges part of the backlog first.
func TestRestartWhileServerDown(t *testing.T) {
	for _, acceptFirst := range []int{0, 3} {
		t.Run(fmt.Sprintf("accept %d batches first", acceptFirst), func(t *testing.T) {
			down := func(n int, _ []byte, _ http.ResponseWriter) int {
				if n < acceptFirst {
					return 204
				}
				return 503
			}
			s := newSink(t, down)
			cfg := testConfig(t, s.url())
			cfg.BatchLines = 200
			cfg.SegmentBytes = 16 << 10
			want := genLines(6000, 1700000000000000000)

			p, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			stop := running(t, p)
			appendAll(t, p, want[:3000], 250)
			waitFor(t, "failures", func() bool { return p.Stats().Retries >= 3 })
			stop()
			appendAll(t, p, want[3000:], 250) // staged only: Close flushes it
			if err := p.Close(); err != nil {
				t.Fatal(err)
			}
			if got := s.got(); (len(got) > 0) != (acceptFirst > 0) || !equalLines(got, want[:len(got)]) {
				t.Fatalf("before restart the server has %d lines, not a prefix of what was appended", len(got))
			}

			s.setAnswer(nil)
			p2, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			if st := p2.Stats(); st.BacklogBytes <= 0 {
				t.Fatalf("reopened backlog is empty: %+v", st)
			}
			stop = running(t, p2)
			waitFor(t, "all lines", func() bool { return len(s.got()) >= len(want) })
			// Nothing left unacknowledged: the sender has no batch it could
			// send a second time.
			waitFor(t, "empty backlog", func() bool { return p2.Stats().BacklogBytes == 0 })
			stop()
			if err := p2.Close(); err != nil {
				t.Fatal(err)
			}
			exactlyOnceInOrder(t, s.got(), want)
			segs, _ := filepath.Glob(filepath.Join(cfg.Dir, "seg-*.lp"))
			if len(segs) > 1 {
				t.Errorf("acknowledged segments left behind: %v", segs)
			}

			// A third open finds nothing to send.
			p3, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			if st := p3.Stats(); st.BacklogBytes != 0 {
				t.Errorf("after everything was sent the backlog holds %d bytes", st.BacklogBytes)
			}
			p3.Close()
		})
	}
}

func TestBacklogBoundDropsOldest(t *testing.T) {
	s := newSink(t, func(int, []byte, http.ResponseWriter) int { return 503 })
	cfg := testConfig(t, s.url())
	cfg.MaxBacklogBytes = 40 << 10
	cfg.SegmentBytes = 8 << 10
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	want := genLines(3000, 1700000000000000000) // ~330 KB, 8x the bound
	for i := 0; i < len(want); i += 100 {
		appendAll(t, p, want[i:i+100], 100)
		if err := p.flush(); err != nil {
			t.Fatal(err)
		}
		if du := dirBytes(t, cfg.Dir); du > cfg.MaxBacklogBytes+200 {
			t.Fatalf("backlog %d bytes on disk, bound %d", du, cfg.MaxBacklogBytes)
		}
	}
	st := p.Stats()
	if st.DroppedSegments == 0 || st.DroppedLines == 0 {
		t.Fatalf("nothing dropped: %+v", st)
	}
	if st.BacklogBytes > cfg.MaxBacklogBytes || st.BacklogBytes+int64(st.DroppedBytes) != int64(st.AppendedBytes) {
		t.Errorf("backlog %d + dropped %d != appended %d", st.BacklogBytes, st.DroppedBytes, st.AppendedBytes)
	}
	if !strings.Contains(st.LastError, "backlog full") {
		t.Errorf("LastError %q", st.LastError)
	}
	s.setAnswer(nil)
	stop := running(t, p)
	kept := len(want) - int(st.DroppedLines)
	waitFor(t, "kept lines", func() bool { return len(s.got()) >= kept })
	stop()
	p.Close()
	// What arrives is the newest lines, in order, once.
	exactlyOnceInOrder(t, s.got(), want[len(want)-kept:])
}

func equalLines(a, b []string) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

func dirBytes(t *testing.T, dir string) int64 {
	segs, _ := filepath.Glob(filepath.Join(dir, "seg-*.lp"))
	var n int64
	for _, f := range segs {
		st, err := os.Stat(f)
		if err != nil {
			t.Fatal(err)
		}
		n += st.Size()
	}
	return n
}

func TestStagingFullDropsAndCounts(t *testing.T) {
	cfg := testConfig(t, "http://127.0.0.1:1/write")
	cfg.MaxBacklogBytes = 8 << 10 // staging is capped at the backlog bound
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	lines := genLines(200, 1e18) // ~22 KB, Run not running
	appendAll(t, p, lines, 1)
	st := p.Stats()
	if st.DroppedLines == 0 || st.AppendedLines+st.DroppedLines != 200 {
		t.Errorf("stats %+v", st)
	}
}

// TestTornTailCutOnOpen builds backlogs as a crash would leave them and
// checks what the Pusher sends from them. The file names and the cursor are
// written by hand, as an earlier version would have left them on disk.
func TestTornTailCutOnOpen(t *testing.T) {
	l := genLines(4, 1e18)
	cases := []struct {
		name   string
		files  map[string]string // segment start -> content
		cursor string            // "" for none
		want   []string
	}{
		{"torn last line", map[string]string{"0": l[0] + l[1] + l[2][:40]}, "", l[:2]},
		{"only a torn line", map[string]string{"0": l[0][:20]}, "", nil},
		{"cursor after first line", map[string]string{"0": l[0] + l[1] + l[2] + "plenum,x"}, string(cursorFile(int64(len(l[0])))), l[1:3]},
		{"cursor inside a line", map[string]string{"0": l[0] + l[1] + l[2]}, string(cursorFile(int64(len(l[0]) + 5))), l[2:3]},
		{"damaged cursor resends all", map[string]string{"0": l[0] + l[1]}, "tsdbpush cursor v1 acked=99 crc=00000000\n", l[:2]},
		{"two segments, first torn", map[string]string{"0": l[0] + l[1][:10], "1000": l[2] + l[3]}, "", []string{l[0], l[2], l[3]}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := newSink(t, nil)
			cfg := testConfig(t, s.url())
			for start, content := range c.files {
				var off int64
				fmt.Sscan(start, &off)
				if err := os.WriteFile(filepath.Join(cfg.Dir, segmentFile(off)), []byte(content), 0o644); err != nil {
					t.Fatal(err)
				}
			}
			if c.cursor != "" {
				os.WriteFile(filepath.Join(cfg.Dir, "cursor"), []byte(c.cursor), 0o644)
			}
			p, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			for start := range c.files {
				var off int64
				fmt.Sscan(start, &off)
				b, err := os.ReadFile(filepath.Join(cfg.Dir, segmentFile(off)))
				if err == nil && len(b) > 0 && b[len(b)-1] != '\n' {
					t.Errorf("segment %s still ends in a torn line", start)
				}
			}
			more := genLines(1, 3e18)
			appendAll(t, p, more, 1)
			stop := running(t, p)
			waitFor(t, "lines", func() bool { return len(s.got()) >= len(c.want)+1 })
			stop()
			p.Close()
			exactlyOnceInOrder(t, s.got(), append(append([]string(nil), c.want...), more...))
		})
	}
}

// segmentFile and cursorFile are the on-disk names and cursor format of the
// backlog, spelt out here so that a change to them shows as a failing test.
func segmentFile(start int64) string { return fmt.Sprintf("seg-%020d.lp", start) }

func cursorFile(acked int64) []byte {
	body := fmt.Sprintf("tsdbpush cursor v1 acked=%d", acked)
	return fmt.Appendf(nil, "%s crc=%08x\n", body, crc32.ChecksumIEEE([]byte(body)))
}

func TestAppendContract(t *testing.T) {
	cfg := testConfig(t, "http://127.0.0.1:1/write")
	p, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	if err := p.Append([]byte("a 1\nb 2")); err == nil {
		t.Error("a partial line was accepted")
	}
	buf := []byte("m v=1 1\n")
	if err := p.Append(buf); err != nil {
		t.Fatal(err)
	}
	buf[0] = 'X' // Append copied
	if err := p.Close(); err != nil {
		t.Fatal(err)
	}
	if err := p.Append([]byte("m v=2 2\n")); err != ErrClosed {
		t.Errorf("Append after Close: %v", err)
	}
	if err := p.Run(context.Background()); err != ErrClosed {
		t.Errorf("Run after Close: %v", err)
	}
	segs, _ := filepath.Glob(filepath.Join(cfg.Dir, "seg-*.lp"))
	if len(segs) != 1 {
		t.Fatalf("segments %v", segs)
	}
	if b, _ := os.ReadFile(segs[0]); string(b) != "m v=1 1\n" {
		t.Errorf("segment holds %q", b)
	}
}

func TestOpenConfigErrors(t *testing.T) {
	for _, c := range []struct {
		cfg  Config
		want string
	}{
		{Config{URL: "", Dir: "x"}, "URL"},
		{Config{URL: "ftp://h/write", Dir: "x"}, "URL"},
		{Config{URL: "http:///write", Dir: "x"}, "URL"},
		{Config{URL: "http://h/write"}, "Dir"},
	} {
		if _, err := Open(c.cfg); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%+v: error %v, want one naming %s", c.cfg, err, c.want)
		}
	}
}

func TestParseRetryAfter(t *testing.T) {
	now := time.Date(2026, 1, 2, 3, 4, 5, 0, time.UTC)
	for _, c := range []struct {
		in   string
		want time.Duration
		ok   bool
	}{
		{"120", 2 * time.Minute, true},
		{"0", 0, true},
		{"-3", 0, false},
		{"soon", 0, false},
		{now.Add(90 * time.Second).Format(http.TimeFormat), 90 * time.Second, true},
		{now.Add(-time.Hour).Format(http.TimeFormat), 0, true},
	} {
		got, ok := parseRetryAfter(c.in, now)
		if got != c.want || ok != c.ok {
			t.Errorf("%q: %v %v, want %v %v", c.in, got, ok, c.want, c.ok)
		}
	}
}

// TestReport: the health report carries Stats' values under the metric names
// the collector exports, and Up follows the last request.
func TestReport(t *testing.T) {
	failing := func(int, []byte, http.ResponseWriter) int { return 503 }
	refusing := func(_ int, body []byte, _ http.ResponseWriter) int {
		if bytes.Contains(body, []byte("malformed")) {
			return 400
		}
		return 204
	}
	cases := []struct {
		name    string
		answer  func(int, []byte, http.ResponseWriter) int
		backlog int64 // MaxBacklogBytes, 0 for the default
		drive   func(t *testing.T, p *Pusher)
		wantUp  bool
		nonzero []string // report values that must not be zero
	}{
		{"fresh: nothing to send", nil, 0, func(*testing.T, *Pusher) {}, true, nil},
		{"all sent", nil, 0, func(t *testing.T, p *Pusher) {
			appendAll(t, p, genLines(100, 1e18), 10)
			stop := running(t, p)
			waitFor(t, "sent", func() bool { return p.Stats().SentLines == 100 })
			stop()
		}, true, []string{"sent_lines"}},
		{"server failing", failing, 0, func(t *testing.T, p *Pusher) {
			appendAll(t, p, genLines(100, 1e18), 10)
			stop := running(t, p)
			waitFor(t, "retries", func() bool { return p.Stats().Retries >= 2 })
			stop()
		}, false, []string{"retries", "backlog_bytes"}},
		{"batch refused, rest sent", refusing, 0, func(t *testing.T, p *Pusher) {
			stop := running(t, p)
			appendAll(t, p, genLines(10, 1e18), 10)
			waitFor(t, "sent", func() bool { return p.Stats().SentLines == 10 })
			appendAll(t, p, []string{"plenum,channel=x value=malformed 1\n"}, 1)
			waitFor(t, "refused", func() bool { return p.Stats().RejectedLines == 1 })
			stop()
		}, true, []string{"sent_lines", "rejected_lines"}},
		{"staging full", nil, 8 << 10, func(t *testing.T, p *Pusher) {
			appendAll(t, p, genLines(200, 1e18), 1) // Run not running
		}, true, []string{"dropped_lines", "backlog_bytes"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s := newSink(t, c.answer)
			cfg := testConfig(t, s.url())
			cfg.MaxBacklogBytes = c.backlog
			p, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			defer p.Close()
			c.drive(t, p)
			r := p.Report()
			st := p.Stats()
			want := pipeline.HealthReport{
				Kind: "push", Name: "push", Up: c.wantUp,
				Counters: []pipeline.NamedCount{
					{Name: "sent_lines", Value: st.SentLines},
					{Name: "retries", Value: st.Retries},
					{Name: "rejected_lines", Value: st.RejectedLines},
					{Name: "dropped_lines", Value: st.DroppedLines},
				},
				Gauges: []pipeline.NamedValue{{Name: "backlog_bytes", Value: float64(st.BacklogBytes)}},
			}
			if !reflect.DeepEqual(r, want) {
				t.Errorf("report\n%+v\nwant\n%+v", r, want)
			}
			values := map[string]float64{}
			for _, nc := range r.Counters {
				values[nc.Name] = float64(nc.Value)
			}
			for _, nv := range r.Gauges {
				values[nv.Name] = nv.Value
			}
			for _, name := range c.nonzero {
				if values[name] == 0 {
					t.Errorf("%s is 0 after %s", name, c.name)
				}
			}
		})
	}
}

// TestShutdownDrainsBacklog: lines appended just before a shutdown reach a
// server that answers, within the drain, instead of waiting on disk for the
// next start; a server that refuses or does not answer leaves them on disk,
// Run returns within the drain, and the log says what is left.
func TestShutdownDrainsBacklog(t *testing.T) {
	for _, tc := range []struct {
		name   string
		answer func(release <-chan struct{}) func(n int, body []byte, w http.ResponseWriter) int
		sent   bool
	}{
		{name: "server answers", sent: true},
		{name: "server refuses", answer: func(<-chan struct{}) func(int, []byte, http.ResponseWriter) int {
			return func(int, []byte, http.ResponseWriter) int { return 503 }
		}},
		{name: "server does not answer", answer: func(release <-chan struct{}) func(int, []byte, http.ResponseWriter) int {
			return func(int, []byte, http.ResponseWriter) int { <-release; return 204 }
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			release := make(chan struct{})
			var answer func(int, []byte, http.ResponseWriter) int
			if tc.answer != nil {
				answer = tc.answer(release)
			}
			s := newSink(t, answer)
			t.Cleanup(func() { close(release) }) // runs before the server's Close
			cfg := testConfig(t, s.url())
			// Nothing is written or sent before the shutdown: the whole
			// backlog is what the drain must handle.
			cfg.FlushEvery = time.Hour
			cfg.Drain = 500 * time.Millisecond
			var logs bytes.Buffer
			var logMu sync.Mutex
			cfg.Logger = slog.New(slog.NewTextHandler(writerFunc(func(b []byte) (int, error) {
				logMu.Lock()
				defer logMu.Unlock()
				return logs.Write(b)
			}), nil))
			want := genLines(300, 1700000000000000000)
			p, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan error, 1)
			go func() { done <- p.Run(ctx) }()
			appendAll(t, p, want, 50)
			start := time.Now()
			cancel()
			select {
			case err := <-done:
				if err != nil {
					t.Fatalf("Run: %v", err)
				}
			case <-time.After(cfg.Drain + 5*time.Second):
				t.Fatalf("Run did not return within the drain of %s", cfg.Drain)
			}
			took := time.Since(start)
			st := p.Stats()
			if err := p.Close(); err != nil {
				t.Fatal(err)
			}
			logMu.Lock()
			text := logs.String()
			logMu.Unlock()
			if tc.sent {
				exactlyOnceInOrder(t, s.got(), want)
				if st.BacklogBytes != 0 {
					t.Errorf("backlog holds %d bytes after the drain", st.BacklogBytes)
				}
				if strings.Contains(text, "stopping with lines") {
					t.Errorf("log reports unsent lines although all were sent:\n%s", text)
				}
				return
			}
			if len(s.got()) != 0 {
				t.Fatalf("server stored %d lines", len(s.got()))
			}
			var size int
			for _, l := range want {
				size += len(l)
			}
			if st.BacklogBytes != int64(size) {
				t.Errorf("backlog %d bytes, want the %d appended", st.BacklogBytes, size)
			}
			if !strings.Contains(text, "stopping with lines the server has not taken") || !strings.Contains(text, fmt.Sprintf("unsent_bytes=%d", size)) {
				t.Errorf("log does not say what is left unsent:\n%s", text)
			}
			t.Logf("Run returned %s after the shutdown", took.Round(time.Millisecond))
			// Still there for the next start.
			p2, err := Open(cfg)
			if err != nil {
				t.Fatal(err)
			}
			if got := p2.Stats().BacklogBytes; got != int64(size) {
				t.Errorf("reopened backlog holds %d bytes, want %d", got, size)
			}
			p2.Close()
		})
	}
}

// writerFunc is an io.Writer from a function.
type writerFunc func([]byte) (int, error)

func (f writerFunc) Write(b []byte) (int, error) { return f(b) }
