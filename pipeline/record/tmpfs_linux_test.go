package record

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// mountTmpfs mounts a tmpfs of the given size on a new directory, or skips
// the test when mounting is not permitted.
func mountTmpfs(t *testing.T, size string) string {
	t.Helper()
	dir := t.TempDir()
	if err := syscall.Mount("tmpfs", dir, "tmpfs", 0, "size="+size); err != nil {
		t.Skipf("cannot mount a %s tmpfs to fill up (%v): needs root or CAP_SYS_ADMIN; the injected-disk tests cover the logic", size, err)
	}
	t.Cleanup(func() {
		if err := syscall.Unmount(dir, syscall.MNT_DETACH); err != nil {
			t.Errorf("unmount %s: %v", dir, err)
		}
	})
	return dir
}

// TestRealFullDisk fills a real filesystem mid-run (32 MiB: room for the
// 16 MiB held once space is freed), frees space, and checks that the run's
// file grows again, holds only whole lines, carries the gap, and that the
// summary counts what is in the file.
func TestRealFullDisk(t *testing.T) {
	dir := mountTmpfs(t, "32m")
	r, err := Open(Config{Dir: dir, Run: "tmpfs", Vehicle: "v"}, testRegistry(t))
	if err != nil {
		t.Fatal(err)
	}
	closed := false
	t.Cleanup(func() { // before the unmount
		if !closed {
			r.Close()
		}
	})
	data := filepath.Join(dir, "tmpfs", "0001.lp")
	size := func() int64 {
		st, err := os.Stat(data)
		if err != nil {
			t.Fatal(err)
		}
		return st.Size()
	}
	t0 := time.Unix(1000, 0)
	i := 0
	put := func(n int) {
		for range n {
			r.Write(pipeline.Sample{Channel: pipeline.ChannelID(i & 1), Value: float64(i), Time: t0.Add(time.Duration(i) * time.Millisecond)})
			i++
		}
	}
	// A filler takes all but about 100 kB.
	filler := filepath.Join(dir, "filler")
	var st syscall.Statfs_t
	if err := syscall.Statfs(dir, &st); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filler, make([]byte, int64(st.Bavail)*st.Bsize-100_000), 0o644); err != nil {
		t.Fatal(err)
	}
	put(200)
	if err := r.Sync(); err != nil {
		t.Fatal(err)
	}
	// Past the free space; Sync is retried until the disk refuses.
	for r.Sync() == nil {
		put(2000)
	}
	full := size()
	// More than can be held: some is lost.
	put(250_000)
	r.Sync()
	if r.Lost() == 0 {
		t.Fatalf("nothing lost after %d samples on a full disk", i)
	}
	if err := os.Remove(filler); err != nil {
		t.Fatal(err)
	}
	// Retried with backoff (at most 2 s); wait for the file to grow.
	deadline := time.Now().Add(10 * time.Second)
	for size() <= full {
		if time.Now().After(deadline) {
			t.Fatalf("the file never grew again after space was freed (%d bytes, lost %d)", full, r.Lost())
		}
		put(10)
		r.Sync()
		time.Sleep(10 * time.Millisecond)
	}
	for r.Sync() != nil { // what is held may need a few retries
		if time.Now().After(deadline) {
			t.Fatal("still refused after space was freed")
		}
		time.Sleep(10 * time.Millisecond)
	}
	put(100)
	closeErr := r.Close()
	closed = true
	b, err := os.ReadFile(data)
	if err != nil {
		t.Fatal(err)
	}
	samples, gaps, ev := lines(t, b, "recording_gap")
	if gaps != 1 || !strings.Contains(ev[0], "lost_samples=") {
		t.Fatalf("%d gap events in the file: %q", gaps, ev)
	}
	// Read the summary as JSON, field by field.
	var sum map[string]any
	sb, err := os.ReadFile(filepath.Join(dir, "tmpfs", "summary.json"))
	if err != nil || json.Unmarshal(sb, &sum) != nil {
		t.Fatalf("summary.json: %v %s", err, sb)
	}
	lost, _ := sum["samples_lost"].(float64)
	if sum["samples"] != float64(samples) || lost == 0 || int(lost)+samples != i {
		t.Fatalf("summary %s; %d samples in the file, %d put", sb, samples, i)
	}
	if closeErr == nil || !strings.Contains(closeErr.Error(), "lost") {
		t.Fatalf("Close of a run that lost data: %v", closeErr)
	}
}
