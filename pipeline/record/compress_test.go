package record

import (
	"bytes"
	"compress/gzip"
	"context"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// recordRun records n frames of two channels into a run under dir with
// segments of rotate bytes, and returns the run's directory and the data
// files the recorder reported closed, in order.
func recordRun(t *testing.T, dir, run string, n int, rotate int64) (string, []string) {
	t.Helper()
	reg := testRegistry(t)
	var mu sync.Mutex
	var closed []string
	r, err := Open(Config{Dir: dir, Run: run, Vehicle: "v", RotateBytes: rotate,
		Closed: func(p string) { mu.Lock(); closed = append(closed, p); mu.Unlock() }}, reg)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Unix(1_800_000_000, 0)
	for i := range n {
		at := t0.Add(time.Duration(i) * 10 * time.Millisecond)
		r.Write(pipeline.Sample{Channel: 0, Value: 100000 + float64(i)/3, Time: at})
		r.Write(pipeline.Sample{Channel: 1, Value: 800 + float64(i%700)*7.25, Time: at})
		if i%100 == 99 {
			if err := r.Sync(); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	mu.Lock()
	defer mu.Unlock()
	return r.Dir(), closed
}

func TestCompressSegmentRoundTrip(t *testing.T) {
	rd, closed := recordRun(t, t.TempDir(), "r1", 3000, 0)
	if len(closed) != 1 || filepath.Base(closed[0]) != "0001.lp" {
		t.Fatalf("closed = %v, want the one segment", closed)
	}
	plain, err := os.ReadFile(closed[0])
	if err != nil {
		t.Fatal(err)
	}
	if err := CompressSegment(context.Background(), closed[0], 0); err != nil {
		t.Fatal(err)
	}
	if exists(closed[0]) || exists(closed[0]+".gz.tmp") {
		t.Fatal("the .lp or the .tmp is still there")
	}
	z, err := os.ReadFile(closed[0] + ".gz")
	if err != nil {
		t.Fatal(err)
	}
	zr, err := gzip.NewReader(bytes.NewReader(z))
	if err != nil {
		t.Fatal(err)
	}
	var back bytes.Buffer
	if _, err := back.ReadFrom(zr); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(back.Bytes(), plain) {
		t.Fatalf("the .lp.gz holds %d bytes that differ from the %d of the .lp", back.Len(), len(plain))
	}
	t.Logf("%d bytes → %d (%.1f%%)", len(plain), len(z), 100*float64(len(z))/float64(len(plain)))
	// Readers read it in place of the .lp, also under the old name.
	files, _ := DataFiles(rd)
	if len(files) != 1 || !strings.HasSuffix(files[0], "0001.lp.gz") {
		t.Fatalf("DataFiles = %v", files)
	}
	if b, err := ReadFile(closed[0]); err != nil || !bytes.Equal(b, plain) {
		t.Fatalf("ReadFile of the replaced .lp: %d bytes, %v", len(b), err)
	}
	// A second compression of the same segment has nothing to do.
	if err := CompressSegment(context.Background(), closed[0], 0); err != nil {
		t.Fatal(err)
	}
}

func TestCompressSegmentFailureLeavesTheLP(t *testing.T) {
	rd, closed := recordRun(t, t.TempDir(), "r1", 200, 0)
	before, _ := os.ReadFile(closed[0])
	// A directory where the .tmp would go: the compression fails.
	if err := os.Mkdir(closed[0]+".gz.tmp", 0o755); err != nil {
		t.Fatal(err)
	}
	if err := CompressSegment(context.Background(), closed[0], 0); err == nil {
		t.Fatal("no error")
	}
	after, err := os.ReadFile(closed[0])
	if err != nil || !bytes.Equal(before, after) || exists(closed[0]+".gz") {
		t.Fatalf("the .lp changed or a .lp.gz appeared: %v", err)
	}
	// Cancelled: the .lp stays, no .tmp is left.
	os.Remove(closed[0] + ".gz.tmp")
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if err := CompressSegment(ctx, closed[0], 0); err == nil {
		t.Fatal("no error when cancelled")
	}
	if !exists(closed[0]) || exists(closed[0]+".gz.tmp") || exists(closed[0]+".gz") {
		t.Fatal("a cancelled compression left something behind")
	}
	if files, _ := DataFiles(rd); len(files) != 1 || files[0] != closed[0] {
		t.Fatalf("DataFiles = %v", files)
	}
}

// TestRecoverCompression leaves each crash point of a compression behind
// and checks what the recovery makes of it and that readers read the same
// lines before and after.
func TestRecoverCompression(t *testing.T) {
	gz := func(b []byte) []byte {
		var w bytes.Buffer
		zw := gzip.NewWriter(&w)
		zw.Write(b)
		zw.Close()
		return w.Bytes()
	}
	cases := []struct {
		name    string
		mk      func(lp string, data []byte) // leaves the crash point behind
		actions []string
		want    []string // files of the segment after recovery
	}{
		{"cut while writing the tmp", func(lp string, data []byte) {
			os.WriteFile(lp+".gz.tmp", gz(data)[:40], 0o644)
		}, []string{"removed_tmp"}, []string{"0001.lp"}},
		{"cut after the rename, before the .lp was removed", func(lp string, data []byte) {
			os.WriteFile(lp+".gz", gz(data), 0o644)
		}, []string{"removed_lp"}, []string{"0001.lp.gz"}},
		{"a .lp.gz that is not the .lp (torn)", func(lp string, data []byte) {
			os.WriteFile(lp+".gz", gz(data)[:len(gz(data))/2], 0o644)
		}, []string{"removed_bad_gz"}, []string{"0001.lp"}},
		{"a .lp.gz of other lines", func(lp string, data []byte) {
			os.WriteFile(lp+".gz", gz(data[:len(data)/2]), 0o644)
		}, []string{"removed_bad_gz"}, []string{"0001.lp"}},
		{"tmp and a complete pair", func(lp string, data []byte) {
			os.WriteFile(lp+".gz.tmp", []byte("x"), 0o644)
			os.WriteFile(lp+".gz", gz(data), 0o644)
		}, []string{"removed_tmp", "removed_lp"}, []string{"0001.lp.gz"}},
		{"nothing left over", func(string, []byte) {}, nil, []string{"0001.lp"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			rd, closed := recordRun(t, dir, "r1", 500, 0)
			data, _ := os.ReadFile(closed[0])
			want, err := ReadAll([]string{closed[0]})
			if err != nil {
				t.Fatal(err)
			}
			c.mk(closed[0], data)
			got, err := RecoverCompression(dir)
			if err != nil {
				t.Fatal(err)
			}
			var actions []string
			for _, g := range got {
				actions = append(actions, g.Action)
			}
			if !slices.Equal(actions, c.actions) {
				t.Errorf("actions = %v, want %v", actions, c.actions)
			}
			var segs []string
			ents, _ := os.ReadDir(rd)
			for _, e := range ents {
				if strings.HasPrefix(e.Name(), "0001") {
					segs = append(segs, e.Name())
				}
			}
			if !slices.Equal(segs, c.want) {
				t.Errorf("files = %v, want %v", segs, c.want)
			}
			files, _ := DataFiles(rd)
			back, err := ReadAll(files)
			if err != nil {
				t.Fatal(err)
			}
			if !slices.Equal(back.Points, want.Points) {
				t.Errorf("read back %d points, want %d", len(back.Points), len(want.Points))
			}
		})
	}
}

func TestClosedSegments(t *testing.T) {
	dir := t.TempDir()
	mk := func(run string, files ...string) {
		os.MkdirAll(filepath.Join(dir, run), 0o755)
		for _, f := range files {
			os.WriteFile(filepath.Join(dir, run, f), nil, 0o644)
		}
	}
	mk("a-ended", "run.json", "0001.lp", "0002.lp", "ended")
	mk("b-cut", "run.json", "0001.lp.gz", "0002.lp", "ended_abnormally")
	mk("c-live", "run.json", "0001.lp.gz", "0002.lp", "0003.lp")
	mk("d-live-one", "run.json", "0001.lp")
	mk("e-pair", "run.json", "0001.lp", "0001.lp.gz", "ended")
	got, err := ClosedSegments(dir)
	if err != nil {
		t.Fatal(err)
	}
	var rel []string
	for _, g := range got {
		r, _ := filepath.Rel(dir, g)
		rel = append(rel, r)
	}
	want := []string{"a-ended/0001.lp", "a-ended/0002.lp", "b-cut/0002.lp", "c-live/0002.lp", "e-pair/0001.lp"}
	if !slices.Equal(rel, want) {
		t.Fatalf("closed = %v, want %v", rel, want)
	}
}

// TestCompressorCompressesRotatedSegments records a run in small segments
// with a compressor attached: every closed segment ends compressed, the
// recorder never waited on it, and the run reads back point for point.
func TestCompressorCompressesRotatedSegments(t *testing.T) {
	dir := t.TempDir()
	never := make(chan time.Time)
	c := NewCompressor(CompressorConfig{Dir: dir, After: func(time.Duration) <-chan time.Time { return never }})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error)
	go func() { done <- c.Run(ctx) }()

	reg := testRegistry(t)
	r, err := Open(Config{Dir: dir, Run: "r1", Vehicle: "v", RotateBytes: 32 << 10, Closed: c.Closed}, reg)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Unix(1_800_000_000, 0)
	for i := range 5000 {
		r.Write(pipeline.Sample{Channel: pipeline.ChannelID(i % 2), Value: float64(i) * 1.5, Time: t0.Add(time.Duration(i) * time.Millisecond)})
		if i%200 == 199 {
			r.Sync()
		}
	}
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	deadline := time.Now().Add(10 * time.Second)
	for {
		lps, _ := filepath.Glob(filepath.Join(r.Dir(), "*.lp"))
		if len(lps) == 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("still uncompressed: %v; report %+v", lps, c.Report())
		}
		time.Sleep(10 * time.Millisecond)
	}
	cancel()
	<-done
	files, _ := DataFiles(r.Dir())
	if len(files) < 5 {
		t.Fatalf("%d segments; the test wants several", len(files))
	}
	rec, err := ReadAll(files)
	if err != nil {
		t.Fatal(err)
	}
	if len(rec.Points) != 5000 {
		t.Fatalf("read back %d points, want 5000", len(rec.Points))
	}
	for i, p := range rec.Points {
		if p.Value != float64(i)*1.5 {
			t.Fatalf("point %d: %v", i, p.Value)
		}
	}
	rep := c.Report()
	if n, _ := rep.Counter("compressed_segments"); n != uint64(len(files)) {
		t.Errorf("compressed_segments = %d, want %d", n, len(files))
	}
	if n, _ := rep.Counter("failures"); n != 0 || !rep.Up {
		t.Errorf("failures = %d, up %v", n, rep.Up)
	}
}

// TestCompressorRescanFindsLeftovers: segments left uncompressed (a failed
// compression, a full queue, a daemon stopped first) are found by the
// rescan at the start; a failure is counted and the .lp stays.
func TestCompressorRescanFindsLeftovers(t *testing.T) {
	dir := t.TempDir()
	rdA, _ := recordRun(t, dir, "a", 300, 0)
	rdB, _ := recordRun(t, dir, "b", 300, 0)
	os.Mkdir(filepath.Join(rdB, "0001.lp.gz.tmp"), 0o755) // B's compression fails
	c := NewCompressor(CompressorConfig{Dir: dir, After: func(time.Duration) <-chan time.Time { return nil }})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error)
	go func() { done <- c.Run(ctx) }()
	deadline := time.Now().Add(10 * time.Second)
	for {
		rep := c.Report()
		ok, _ := rep.Counter("compressed_segments")
		bad, _ := rep.Counter("failures")
		if ok == 1 && bad == 1 {
			if rep.Up {
				t.Error("up after a failure")
			}
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("report %+v", rep)
		}
		time.Sleep(10 * time.Millisecond)
	}
	cancel()
	<-done
	if !exists(filepath.Join(rdA, "0001.lp.gz")) || exists(filepath.Join(rdA, "0001.lp")) {
		t.Error("run a was not compressed")
	}
	if !exists(filepath.Join(rdB, "0001.lp")) || exists(filepath.Join(rdB, "0001.lp.gz")) {
		t.Error("run b's failed compression did not leave its .lp")
	}
}

// TestCompressorFinishesTheLastSegmentAtShutdown: the segment a shutdown
// closes reaches the compressor just as its own context ends (its stage
// stops right after the recorder's); it is compressed all the same, within
// the drain.
func TestCompressorFinishesTheLastSegmentAtShutdown(t *testing.T) {
	for range 20 { // either select case may win: both must compress
		dir := t.TempDir()
		_, closed := recordRun(t, dir, "r1", 500, 0)
		c := NewCompressor(CompressorConfig{After: func(time.Duration) <-chan time.Time { return nil }})
		c.Closed(closed[0])
		ctx, cancel := context.WithCancel(context.Background())
		cancel()
		if err := c.Run(ctx); err != nil {
			t.Fatal(err)
		}
		if !exists(closed[0]+".gz") || exists(closed[0]) {
			t.Fatalf("the last segment was not compressed at the shutdown; report %+v", c.Report())
		}
	}
}
