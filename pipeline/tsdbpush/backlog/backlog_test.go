package backlog

import (
	"bytes"
	"fmt"
	"go/parser"
	"go/token"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

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

func testConfig(t *testing.T) Config {
	return Config{Dir: t.TempDir(), Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}
}

func open(t *testing.T, cfg Config) *Backlog {
	t.Helper()
	b, err := Open(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// write writes lines in chunks of per lines and syncs after each chunk,
// returning what the syncs dropped.
func write(t *testing.T, b *Backlog, lines []string, per int) Dropped {
	t.Helper()
	var d Dropped
	for i := 0; i < len(lines); i += per {
		if err := b.Write([]byte(strings.Join(lines[i:min(i+per, len(lines))], ""))); err != nil {
			t.Fatal(err)
		}
		got, err := b.Sync()
		if err != nil {
			t.Fatal(err)
		}
		d.Segments += got.Segments
		d.Lines += got.Lines
		d.Bytes += got.Bytes
	}
	return d
}

// drain reads and acknowledges batches of at most maxBytes and maxLines
// until upTo lines are read (all when upTo < 0) and returns the lines.
func drain(t *testing.T, b *Backlog, maxBytes, maxLines, upTo int) []string {
	t.Helper()
	var out []string
	for upTo < 0 || len(out) < upTo {
		limit := maxLines
		if upTo >= 0 && (limit <= 0 || limit > upTo-len(out)) {
			limit = upTo - len(out)
		}
		bt, ok, err := b.Next(maxBytes, limit)
		if err != nil {
			t.Fatal(err)
		}
		if !ok {
			break
		}
		if bt.End-bt.Start != int64(len(bt.Data)) || bt.Lines != bytes.Count(bt.Data, []byte{'\n'}) {
			t.Fatalf("batch [%d, %d) with %d bytes, %d lines", bt.Start, bt.End, len(bt.Data), bt.Lines)
		}
		out = append(out, strings.SplitAfter(strings.TrimSuffix(string(bt.Data), "\n"), "\n")...)
		out[len(out)-1] += "\n"
		if err := b.Ack(bt.End); err != nil {
			t.Fatal(err)
		}
	}
	return out
}

func equal(t *testing.T, got, want []string) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("got %d lines, want %d", len(got), len(want))
	}
	for i := range want {
		if got[i] != want[i] {
			t.Fatalf("line %d: got %q, want %q", i, got[i], want[i])
		}
	}
}

func segBytes(t *testing.T, dir string) int64 {
	t.Helper()
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

// TestFullDropsOldest: past MaxBytes the oldest segments go, unsent lines
// in them are counted, the directory stays within the bound plus one line,
// and what is read back is the newest lines, in order.
func TestFullDropsOldest(t *testing.T) {
	const lineLen = 109 // genLines' length for these values
	cases := []struct {
		name      string
		max, seg  int64
		n, per    int
		ackFirst  int // lines written, read and acknowledged before the rest
		wantDrops bool
	}{
		{"8x the bound, nothing sent", 40 << 10, 8 << 10, 3000, 100, 0, true},
		{"2.5x the bound, one line per write", 40 << 10, 8 << 10, 1000, 1, 0, true},
		{"half sent first", 40 << 10, 8 << 10, 3000, 100, 1500, true},
		{"within the bound", 1 << 20, 16 << 10, 3000, 100, 0, false},
		{"exactly one segment", 8 << 10, 8 << 10, 200, 10, 0, true},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := testConfig(t)
			cfg.MaxBytes, cfg.SegmentBytes = c.max, c.seg
			b := open(t, cfg)
			lines := genLines(c.n, 1e18)
			if len(lines[0]) != lineLen {
				t.Fatalf("line length %d", len(lines[0]))
			}
			var sent []string
			for i := 0; i < c.ackFirst; i += c.per {
				write(t, b, lines[i:min(i+c.per, c.ackFirst)], c.per)
				sent = append(sent, drain(t, b, 1<<20, 0, -1)...)
			}
			equal(t, sent, lines[:c.ackFirst])
			var d Dropped
			for i := c.ackFirst; i < c.n; i += c.per {
				d1 := write(t, b, lines[i:min(i+c.per, c.n)], c.per)
				d.Segments += d1.Segments
				d.Lines += d1.Lines
				d.Bytes += d1.Bytes
				if du := segBytes(t, cfg.Dir); du > c.max+lineLen {
					t.Fatalf("%d bytes on disk, bound %d", du, c.max)
				}
			}
			st := b.Stats()
			if (st.DroppedSegments > 0) != c.wantDrops {
				t.Fatalf("dropped %d segments, want drops: %v", st.DroppedSegments, c.wantDrops)
			}
			if st.DroppedSegments != d.Segments || st.DroppedLines != d.Lines || st.DroppedBytes != d.Bytes {
				t.Errorf("Sync reported %+v, Stats %+v", d, st)
			}
			if st.DroppedBytes != st.DroppedLines*lineLen {
				t.Errorf("dropped %d bytes for %d lines", st.DroppedBytes, st.DroppedLines)
			}
			unsent := int64(c.n-c.ackFirst) * lineLen
			if st.PendingBytes+int64(st.DroppedBytes) != unsent || st.PendingBytes > c.max {
				t.Errorf("pending %d + dropped %d != unsent %d", st.PendingBytes, st.DroppedBytes, unsent)
			}
			kept := c.n - c.ackFirst - int(st.DroppedLines)
			equal(t, drain(t, b, 4096, 0, -1), lines[c.n-kept:])
			if err := b.Close(); err != nil {
				t.Fatal(err)
			}
		})
	}
}

// TestRestartResumesAtCursor: after a reopen, reading resumes where the last
// acknowledgement left it, whether the backlog was closed or abandoned (a
// crash: no Close, cursor as of the last Ack).
func TestRestartResumesAtCursor(t *testing.T) {
	lines := genLines(1000, 1e18)
	cases := []struct {
		name       string
		ackBatches int // hundreds of lines acknowledged before the restart
		close      bool
	}{
		{"nothing sent, closed", 0, true},
		{"nothing sent, crashed", 0, false},
		{"three batches, closed", 3, true},
		{"three batches, crashed", 3, false},
		{"all sent, closed", 10, true},
		{"all sent, crashed", 10, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := testConfig(t)
			cfg.SegmentBytes = 16 << 10 // several segments
			b := open(t, cfg)
			write(t, b, lines, 50)
			equal(t, drain(t, b, 1<<20, 100, c.ackBatches*100), lines[:c.ackBatches*100])
			if c.close {
				if err := b.Close(); err != nil {
					t.Fatal(err)
				}
			} else if b.cur != nil {
				b.cur.Close() // the process is gone: no cursor write, no cleanup
			}
			b2 := open(t, cfg)
			rest := lines[c.ackBatches*100:]
			if got, want := b2.Pending(), int64(len(strings.Join(rest, ""))); got != want {
				t.Errorf("reopened: %d bytes pending, want %d", got, want)
			}
			more := genLines(5, 2e18)
			write(t, b2, more, 5)
			equal(t, drain(t, b2, 1<<20, 100, -1), append(append([]string(nil), rest...), more...))
			if err := b2.Close(); err != nil {
				t.Fatal(err)
			}
			segs, _ := filepath.Glob(filepath.Join(cfg.Dir, "seg-*.lp"))
			if len(segs) > 1 {
				t.Errorf("acknowledged segments left behind: %v", segs)
			}
			b3 := open(t, cfg)
			if p := b3.Pending(); p != 0 {
				t.Errorf("third open: %d bytes pending", p)
			}
			b3.Close()
		})
	}
}

// TestTornTailCutOnOpen builds backlogs as a crash would leave them.
func TestTornTailCutOnOpen(t *testing.T) {
	l := genLines(4, 1e18)
	cases := []struct {
		name   string
		files  map[int64]string // segment start -> content
		cursor string           // "" for none
		want   []string
	}{
		{"torn last line", map[int64]string{0: l[0] + l[1] + l[2][:40]}, "", l[:2]},
		{"only a torn line", map[int64]string{0: l[0][:20]}, "", nil},
		{"cursor after first line", map[int64]string{0: l[0] + l[1] + l[2] + "plenum,x"}, string(formatCursor(int64(len(l[0])))), l[1:3]},
		{"cursor inside a line", map[int64]string{0: l[0] + l[1] + l[2]}, string(formatCursor(int64(len(l[0]) + 5))), l[2:3]},
		{"damaged cursor resends all", map[int64]string{0: l[0] + l[1]}, "tsdbpush cursor v1 acked=99 crc=00000000\n", l[:2]},
		{"two segments, first torn", map[int64]string{0: l[0] + l[1][:10], 1000: l[2] + l[3]}, "", []string{l[0], l[2], l[3]}},
		{"segment overlaps the next", map[int64]string{0: l[0] + l[1] + l[2], int64(len(l[0]) + 3): l[3]}, "", []string{l[0], l[3]}},
		{"cursor past every segment", map[int64]string{0: l[0] + l[1]}, string(formatCursor(5000)), nil},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := testConfig(t)
			for start, content := range c.files {
				if err := os.WriteFile(filepath.Join(cfg.Dir, segmentName(start)), []byte(content), 0o644); err != nil {
					t.Fatal(err)
				}
			}
			if c.cursor != "" {
				os.WriteFile(filepath.Join(cfg.Dir, "cursor"), []byte(c.cursor), 0o644)
			}
			b := open(t, cfg)
			for start := range c.files {
				data, err := os.ReadFile(filepath.Join(cfg.Dir, segmentName(start)))
				if err == nil && len(data) > 0 && data[len(data)-1] != '\n' {
					t.Errorf("segment %d still ends in a torn line", start)
				}
			}
			more := genLines(1, 3e18)
			write(t, b, more, 1)
			equal(t, drain(t, b, 1<<20, 0, -1), append(append([]string(nil), c.want...), more...))
			b.Close()
		})
	}
}

// TestNextBatches: the limits of one batch, and a batch read again until it
// is acknowledged.
func TestNextBatches(t *testing.T) {
	l := genLines(10, 1e18)
	long := "plenum,channel=x value=\"" + strings.Repeat("y", 300) + "\" 1\n"
	cases := []struct {
		name               string
		lines              []string
		maxBytes, maxLines int
		want               []int // lines per batch
	}{
		{"by lines", l, 1 << 20, 3, []int{3, 3, 3, 1}},
		{"by bytes", l, 2*len(l[0]) + 10, 0, []int{2, 2, 2, 2, 2}},
		{"no limit on lines", l, 1 << 20, 0, []int{10}},
		{"a long line goes alone", []string{l[0], long, l[1]}, 200, 0, []int{1, 1, 1}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			b := open(t, testConfig(t))
			defer b.Close()
			write(t, b, c.lines, len(c.lines))
			var got []int
			var all []string
			for {
				bt, ok, err := b.Next(c.maxBytes, c.maxLines)
				if err != nil {
					t.Fatal(err)
				}
				if !ok {
					break
				}
				again, _, _ := b.Next(c.maxBytes, c.maxLines)
				if again.Start != bt.Start || again.End != bt.End || !bytes.Equal(again.Data, bt.Data) {
					t.Fatalf("Next before Ack moved: [%d, %d) then [%d, %d)", bt.Start, bt.End, again.Start, again.End)
				}
				got = append(got, bt.Lines)
				all = append(all, strings.SplitAfter(strings.TrimSuffix(string(bt.Data), "\n"), "\n")...)
				all[len(all)-1] += "\n"
				if err := b.Ack(bt.End); err != nil {
					t.Fatal(err)
				}
			}
			if fmt.Sprint(got) != fmt.Sprint(c.want) {
				t.Errorf("batches of %v lines, want %v", got, c.want)
			}
			equal(t, all, c.lines)
		})
	}
}

// TestAckNeverMovesBack: an old acknowledgement arriving late changes
// nothing, and the cursor file says so after a reopen.
func TestAckNeverMovesBack(t *testing.T) {
	cfg := testConfig(t)
	b := open(t, cfg)
	l := genLines(4, 1e18)
	write(t, b, l, 4)
	first, _, _ := b.Next(1<<20, 1)
	second := first.End + int64(len(l[1]))
	if err := b.Ack(second); err != nil {
		t.Fatal(err)
	}
	if err := b.Ack(first.End); err != nil {
		t.Fatal(err)
	}
	if err := b.Close(); err != nil {
		t.Fatal(err)
	}
	data, _ := os.ReadFile(filepath.Join(cfg.Dir, "cursor"))
	if acked, err := parseCursor(data); err != nil || acked != second {
		t.Fatalf("cursor %d, %v; want %d", acked, err, second)
	}
	equal(t, drain(t, open(t, cfg), 1<<20, 0, -1), l[2:])
}

func TestSetAside(t *testing.T) {
	cfg := testConfig(t)
	b := open(t, cfg)
	defer b.Close()
	write(t, b, genLines(3, 1e18), 3)
	bt, _, _ := b.Next(1<<20, 1)
	path, err := b.SetAside(bt)
	if err != nil {
		t.Fatal(err)
	}
	if want := filepath.Join(cfg.Dir, "rejected", "00000000000000000000.lp"); path != want {
		t.Errorf("set aside at %s, want %s", path, want)
	}
	if data, _ := os.ReadFile(path); !bytes.Equal(data, bt.Data) {
		t.Errorf("rejected file holds %q", data)
	}
	if again, _, _ := b.Next(1<<20, 1); again.Start != bt.Start {
		t.Error("SetAside acknowledged the batch")
	}
}

func TestOpenNeedsDir(t *testing.T) {
	if _, err := Open(Config{}); err == nil || !strings.Contains(err.Error(), "Dir") {
		t.Errorf("error %v, want one naming Dir", err)
	}
}

func TestCursorRoundTrip(t *testing.T) {
	for _, n := range []int64{0, 1, 123456789, 1<<63 - 1} {
		got, err := parseCursor(formatCursor(n))
		if err != nil || got != n {
			t.Errorf("%d: got %d, %v", n, got, err)
		}
	}
	good := formatCursor(42)
	for _, c := range []struct {
		name string
		in   string
		want string
	}{
		{"empty", "", "byte 0"},
		{"torn", string(good[:len(good)-3]), "no newline"},
		{"trailing", string(good) + "x", "after the line"},
		{"bad crc", strings.Replace(string(good), "acked=42", "acked=43", 1), "crc"},
		{"negative", "tsdbpush cursor v1 acked=-1 crc=00000000\n", "non-negative"},
		{"leading zero", "tsdbpush cursor v1 acked=042 crc=00000000\n", "non-negative"},
		{"short crc", "tsdbpush cursor v1 acked=42 crc=abc\n", "8 hex"},
	} {
		if _, err := parseCursor([]byte(c.in)); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: error %v, want %q", c.name, err, c.want)
		}
	}
}

func TestSegmentNames(t *testing.T) {
	for _, n := range []int64{0, 7, 1 << 40, 1<<63 - 1} {
		got, ok := parseSegmentName(segmentName(n))
		if !ok || got != n {
			t.Errorf("%d: %d %v", n, got, ok)
		}
	}
	for _, bad := range []string{"seg-1.lp", "seg-0000000000000000000a.lp", "seg-99999999999999999999.lp", "cursor", "seg-00000000000000000000.tmp"} {
		if _, ok := parseSegmentName(bad); ok {
			t.Errorf("%q parsed", bad)
		}
	}
}

// TestNoNetwork: the backlog is disk only; sending is the caller's concern.
func TestNoNetwork(t *testing.T) {
	files, _ := filepath.Glob("*.go")
	checked := 0
	for _, name := range files {
		if strings.HasSuffix(name, "_test.go") {
			continue
		}
		f, err := parser.ParseFile(token.NewFileSet(), name, nil, parser.ImportsOnly)
		if err != nil {
			t.Fatal(err)
		}
		checked++
		for _, imp := range f.Imports {
			if path := strings.Trim(imp.Path.Value, `"`); path == "net" || strings.HasPrefix(path, "net/") {
				t.Errorf("%s imports %s", name, path)
			}
		}
	}
	if checked == 0 {
		t.Fatal("no source files found")
	}
}
