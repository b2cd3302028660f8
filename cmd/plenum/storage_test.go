package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// maxBytesPerPoint is the target for the demo's data on disk (issue 13:
// storage that fits an SD card).
const maxBytesPerPoint = 25

// recordSimulatedDemo records 60 s of the demo (serial source, derivations
// and detectors, at the demo's 100 frames/s; no OBD) in simulated time into
// a run under dir, syncing every 200 ms of simulated time, and returns the
// run's directory and how many points (lines) it wrote.
func recordSimulatedDemo(t testing.TB, dir string) (string, uint64) {
	t.Helper()
	_, s := demoSimulated(t, 100)
	t0 := time.Unix(1_800_000_000, 0)
	now := t0
	r, err := record.Open(record.Config{Dir: dir, Run: "demo-60s", Vehicle: "brackenfell-rs", ConfigYAML: demoConfig,
		Now: func() time.Time { return now }}, s.reg)
	if err != nil {
		t.Fatal(err)
	}
	var buf []pipeline.Sample
	var evs []pipeline.Event
	lastSync := t0
	s.run(t0, 60*time.Second, 10*time.Millisecond, func(at time.Time) {
		now = at
		buf, evs = s.sub.Drain(buf[:0], evs[:0])
		for _, x := range buf {
			r.Write(x)
		}
		for _, e := range evs {
			r.WriteEvent(e)
		}
		if at.Sub(lastSync) >= 200*time.Millisecond {
			lastSync = at
			if err := r.Sync(); err != nil {
				t.Fatal(err)
			}
		}
	})
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	if s.sub.Dropped() > 0 {
		t.Fatalf("%d samples dropped", s.sub.Dropped())
	}
	return r.Dir(), r.Written()
}

// dataBytes sums the sizes of a run's data files.
func dataBytes(t testing.TB, runDir string) int64 {
	t.Helper()
	files, err := record.DataFiles(runDir)
	if err != nil {
		t.Fatal(err)
	}
	var n int64
	for _, f := range files {
		st, err := os.Stat(f)
		if err != nil {
			t.Fatal(err)
		}
		n += st.Size()
	}
	return n
}

// TestDemoRecordingFitsBytesPerPoint records 60 s of the demo in simulated
// time, compresses its segment as the daemon does when the run ends, and
// checks the bound on disk, that the compressed run reads back to the same
// lines, and that replay, plot, sheet, runs and show read it.
func TestDemoRecordingFitsBytesPerPoint(t *testing.T) {
	dir := t.TempDir()
	runDir, points := recordSimulatedDemo(t, dir)
	plain := dataBytes(t, runDir)
	lp := filepath.Join(runDir, "0001.lp")
	written, err := os.ReadFile(lp)
	if err != nil {
		t.Fatal(err)
	}
	if lines := uint64(bytes.Count(written, []byte{'\n'})); lines != points || points < 100_000 {
		t.Fatalf("%d lines, %d points written: the test wants a full minute of the demo", lines, points)
	}
	if err := record.CompressSegment(context.Background(), lp, 0); err != nil {
		t.Fatal(err)
	}
	onDisk := dataBytes(t, runDir)
	before, after := float64(plain)/float64(points), float64(onDisk)/float64(points)
	t.Logf("%d points: %.1f bytes a point written (%d bytes), %.2f on disk compressed (%d bytes)", points, before, plain, after, onDisk)
	if after > maxBytesPerPoint {
		t.Errorf("%.2f bytes a point on disk; the target is at most %d", after, maxBytesPerPoint)
	}
	back, err := record.ReadFile(lp) // gone: read from the .lp.gz
	if err != nil || !bytes.Equal(back, written) {
		t.Fatalf("the compressed run does not read back to the written lines (%d bytes, want %d): %v", len(back), len(written), err)
	}

	// The readers of recorded runs, on the compressed run.
	var o, e strings.Builder
	cmds := [][]string{
		{"replay", "-in", runDir, "-out", filepath.Join(t.TempDir(), "out.lp")},
		{"plot", "-in", runDir, "-out", filepath.Join(t.TempDir(), "p.svg"), "-channels", "manifold_pressure"},
		{"sheet", "-in", "demo-60s", "-dir", dir, "-out", filepath.Join(t.TempDir(), "s.svg")},
		{"runs", "-dir", dir},
		{"show", "demo-60s", "-dir", dir},
	}
	for _, args := range cmds {
		o.Reset()
		e.Reset()
		if code := run(args, &o, &e); code != 0 {
			t.Errorf("plenum %s: exit %d\n%s%s", strings.Join(args, " "), code, o.String(), e.String())
		}
		if args[0] == "runs" && !strings.Contains(o.String(), "brackenfell-rs") {
			t.Errorf("plenum runs does not list the compressed run:\n%s", o.String())
		}
	}
}

// TestReadersTakeOneFileOfAPair: a compression cut between its rename and
// the removal of the .lp leaves both; the run list and replay read the
// segment once.
func TestReadersTakeOneFileOfAPair(t *testing.T) {
	dir := t.TempDir()
	runDir, points := recordSimulatedDemo(t, dir)
	lp := filepath.Join(runDir, "0001.lp")
	plain, _ := os.ReadFile(lp)
	if err := record.CompressSegment(context.Background(), lp, 0); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(lp, plain, 0o644); err != nil { // the .lp as the cut left it
		t.Fatal(err)
	}
	files, _ := record.DataFiles(runDir)
	if len(files) != 1 {
		t.Fatalf("DataFiles = %v", files)
	}
	rec, err := record.ReadAll(files)
	if err != nil {
		t.Fatal(err)
	}
	evs, err := record.ReadEvents(files)
	if err != nil {
		t.Fatal(err)
	}
	if got := uint64(len(rec.Points) + len(evs)); got != points {
		t.Fatalf("read %d points, want %d (each once)", got, points)
	}
}

// BenchmarkDemoBytesPerPoint reports the bytes a point of 60 s of the demo
// takes as written (line protocol) and on disk after compression, at gzip
// levels 1, 6 (the default) and 9, and the compression's time a point.
func BenchmarkDemoBytesPerPoint(b *testing.B) {
	dir := b.TempDir()
	runDir, points := recordSimulatedDemo(b, dir)
	plain, err := os.ReadFile(filepath.Join(runDir, "0001.lp"))
	if err != nil {
		b.Fatal(err)
	}
	for _, level := range []int{1, 6, 9} {
		b.Run(fmt.Sprintf("gzip-%d", level), func(b *testing.B) {
			var onDisk int64
			for i := range b.N {
				seg := filepath.Join(b.TempDir(), "0001.lp")
				b.StopTimer()
				if err := os.WriteFile(seg, plain, 0o644); err != nil {
					b.Fatal(err)
				}
				b.StartTimer()
				if err := record.CompressSegment(context.Background(), seg, level); err != nil {
					b.Fatal(err)
				}
				if i == 0 {
					st, err := os.Stat(seg + ".gz")
					if err != nil {
						b.Fatal(err)
					}
					onDisk = st.Size()
				}
			}
			b.StopTimer()
			b.ReportMetric(float64(len(plain))/float64(points), "B/point-written")
			b.ReportMetric(float64(onDisk)/float64(points), "B/point-on-disk")
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(points), "ns/point-compress")
			b.ReportMetric(float64(points), "points")
		})
	}
}

// TestDaemonCompressesAndRetains runs the demo daemon over a record
// directory holding earlier runs: the runs older than record.retain's age
// are removed at the start, the recent one is kept and its segment
// compressed, both counted in the metrics; the daemon's own run ends
// compressed.
func TestDaemonCompressesAndRetains(t *testing.T) {
	recDir := t.TempDir()
	mk := func(id string, start time.Time) string {
		rd := filepath.Join(recDir, id)
		os.MkdirAll(rd, 0o755)
		m, _ := json.Marshal(record.Meta{ID: id, Vehicle: "brackenfell-rs", Start: start})
		os.WriteFile(filepath.Join(rd, "run.json"), m, 0o644)
		os.WriteFile(filepath.Join(rd, "0001.lp"), []byte("plenum,channel=engine_speed,run="+id+",source=bench_mcu,vehicle=brackenfell-rs value=900,quality=\"ok\" "+
			fmt.Sprint(start.UnixNano())+"\n"), 0o644)
		os.WriteFile(filepath.Join(rd, "ended"), []byte("x\n"), 0o644)
		return rd
	}
	now := time.Now()
	old1 := mk("old-1", now.Add(-90*24*time.Hour))
	old2 := mk("old-2", now.Add(-31*24*time.Hour))
	recent := mk("recent", now.Add(-2*time.Hour))
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	httpAddr, _, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.Record.Dir = recDir
		c.Record.Retain = config.Retain{MaxAgeDays: 30}
	})
	gone := func(p string) bool { _, err := os.Stat(p); return os.IsNotExist(err) }
	deadline := time.Now().Add(20 * time.Second)
	for !(gone(old1) && gone(old2) && gone(filepath.Join(recent, "0001.lp"))) {
		if time.Now().After(deadline) {
			t.Fatalf("old runs gone %v %v, recent run compressed %v", gone(old1), gone(old2), gone(filepath.Join(recent, "0001.lp")))
		}
		time.Sleep(20 * time.Millisecond)
	}
	if b, err := record.ReadFile(filepath.Join(recent, "0001.lp.gz")); err != nil || !bytes.Contains(b, []byte("run=recent")) {
		t.Errorf("the recent run's compressed segment: %q, %v", b, err)
	}
	// The counters follow the files by a moment: wait for them.
	wants := []string{
		`plenum_retention_removed_runs_total{retention="record"} 2`,
		`plenum_compressor_compressed_segments_total{compressor="record"} 1`,
		`plenum_retention_held_unpushed_runs{retention="record"} 0`,
	}
	var metrics []byte
	for {
		resp, err := http.Get("http://" + httpAddr + "/metrics")
		if err != nil {
			t.Fatal(err)
		}
		metrics, _ = io.ReadAll(resp.Body)
		resp.Body.Close()
		missing := ""
		for _, w := range wants {
			if !bytes.Contains(metrics, []byte(w)) {
				missing = w
			}
		}
		if missing == "" {
			break
		}
		if time.Now().After(deadline) {
			var near []string
			for _, l := range strings.Split(string(metrics), "\n") {
				if strings.HasPrefix(l, "plenum_compressor") || strings.HasPrefix(l, "plenum_retention") {
					near = append(near, l)
				}
			}
			t.Fatalf("metrics lack %s; they have:\n%s", missing, strings.Join(near, "\n"))
		}
		time.Sleep(20 * time.Millisecond)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	runDirs, _ := record.RunDirs(recDir)
	if len(runDirs) != 2 {
		t.Fatalf("runs left: %v, want the recent one and the daemon's own", runDirs)
	}
	for _, rd := range runDirs {
		files, _ := record.DataFiles(rd)
		if len(files) != 1 || !strings.HasSuffix(files[0], ".lp.gz") {
			t.Errorf("%s: data files %v, want one .lp.gz", rd, files)
		}
	}
}
