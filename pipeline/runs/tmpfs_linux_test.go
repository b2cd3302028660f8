package runs

import (
	"os"
	"path/filepath"
	"syscall"
	"testing"
	"time"
)

// TestRealFullDiskRun fills a real filesystem (32 MiB, of which a run
// holds 8 MiB while the disk refuses) under a run, frees space and
// checks that the run's file grows again, that recorder_behind came at the
// first refused write and stayed, that the losses are counted, and that
// the run's summary and file agree.
func TestRealFullDiskRun(t *testing.T) {
	mnt := t.TempDir()
	if err := syscall.Mount("tmpfs", mnt, "tmpfs", 0, "size=32m"); err != nil {
		t.Skipf("cannot mount a tmpfs to fill up (%v): needs root or CAP_SYS_ADMIN; TestDiskFullRun covers the logic with an injected disk", err)
	}
	t.Cleanup(func() { syscall.Unmount(mnt, syscall.MNT_DETACH) })
	h := newHarnessSized(t, Config{}, 1<<12)
	h.c.cfg.Dir = mnt
	t.Cleanup(func() { h.c.Stop() }) // before the unmount
	id, err := h.c.Start(StartRequest{})
	if err != nil {
		t.Fatal(err)
	}
	data := filepath.Join(mnt, id, "0001.lp")
	size := func() int64 {
		st, err := os.Stat(data)
		if err != nil {
			t.Fatal(err)
		}
		return st.Size()
	}
	var st syscall.Statfs_t
	if err := syscall.Statfs(mnt, &st); err != nil {
		t.Fatal(err)
	}
	filler := filepath.Join(mnt, "filler")
	if err := os.WriteFile(filler, make([]byte, int64(st.Bavail)*st.Bsize-100_000), 0o644); err != nil {
		t.Fatal(err)
	}
	at := time.Unix(3000, 0)
	now := time.Unix(10_000, 0)
	step := func(d time.Duration) {
		now = now.Add(d)
		h.c.sync()
		h.c.watchLoss(now)
	}
	h.feed(100, &at)
	step(time.Second)
	if w := h.warnings(); len(w) != 0 {
		t.Fatalf("warnings with room: %+v", w)
	}
	h.feed(2000, &at)
	step(time.Second)
	if w := h.warnings(); len(w) != 1 || w[0].Kind != "warning_raised" {
		t.Fatalf("at the first refused write: %+v", w)
	}
	full := size()
	for range 40 {
		h.feed(5000, &at)
		step(time.Second)
	}
	if w := h.warnings(); len(w) != 1 {
		t.Fatalf("the warning flickered while samples were being lost: %+v", w)
	}
	lost := h.sub.Dropped()
	if lost == 0 {
		t.Fatal("the recorder's dropped count stayed 0 on a full disk")
	}
	if err := os.Remove(filler); err != nil {
		t.Fatal(err)
	}
	for range 10 {
		h.feed(10, &at)
		step(time.Second)
	}
	if size() <= full {
		t.Fatalf("the file never grew again after space was freed (%d bytes)", full)
	}
	if w := h.warnings(); len(w) != 2 || w[1].Kind != "warning_cleared" {
		t.Fatalf("after space was freed: %+v", w)
	}
	sum, err := h.c.Stop()
	if err == nil {
		t.Fatal("a run that lost data ended without an error")
	}
	lost = h.sub.Dropped() // and what was lost before the first retry after the freeing
	b, rerr := os.ReadFile(data)
	if rerr != nil {
		t.Fatal(rerr)
	}
	samples, gaps := countLines(t, string(b))
	if gaps != 1 || sum.Samples != uint64(samples) || sum.SamplesLost != lost || sum.Samples+sum.SamplesLost != 2100+40*5000+100 {
		t.Fatalf("summary %s: %d samples and %d gaps in the file, %d lost", sum.JSON(), samples, gaps, lost)
	}
}
