package runs

import (
	"fmt"
	"syscall"
)

// DiskSpace returns the space of dir's filesystem that an unprivileged
// writer may still use, and its size.
func DiskSpace(dir string) (free, total uint64, err error) {
	var st syscall.Statfs_t
	if err := syscall.Statfs(dir, &st); err != nil {
		return 0, 0, fmt.Errorf("statfs %s: %w", dir, err)
	}
	return st.Bavail * uint64(st.Bsize), st.Blocks * uint64(st.Bsize), nil
}
