package runs

import (
	"fmt"
	"syscall"
)

// freeBytes returns the space of dir's filesystem that an unprivileged
// writer may still use.
func freeBytes(dir string) (uint64, error) {
	var st syscall.Statfs_t
	if err := syscall.Statfs(dir, &st); err != nil {
		return 0, fmt.Errorf("statfs %s: %w", dir, err)
	}
	return st.Bavail * uint64(st.Bsize), nil
}
