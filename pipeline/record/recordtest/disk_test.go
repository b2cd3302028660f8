package recordtest

import (
	"errors"
	"syscall"
	"testing"
)

// A write beyond the free space is taken in part and refused with ENOSPC;
// truncating frees the space again.
func TestDiskQuota(t *testing.T) {
	d := NewDisk(5)
	f, _ := d.Create("/x/0001.lp")
	if n, err := f.Write([]byte("abcdefgh")); n != 5 || !errors.Is(err, syscall.ENOSPC) {
		t.Fatalf("Write = %d, %v; want 5, ENOSPC", n, err)
	}
	if err := f.Truncate(2); err != nil || string(d.Data("0001.lp")) != "ab" {
		t.Fatalf("after Truncate: %q, %v", d.Data("0001.lp"), err)
	}
	if n, err := f.Write([]byte("cde")); n != 3 || err != nil || d.Writes() != 2 {
		t.Fatalf("Write after freeing = %d, %v (%d writes)", n, err, d.Writes())
	}
	d.SetSyncErr(syscall.EIO)
	if err := f.Sync(); !errors.Is(err, syscall.EIO) {
		t.Fatalf("Sync = %v, want EIO", err)
	}
}
