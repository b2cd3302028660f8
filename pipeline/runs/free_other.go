//go:build !linux

package runs

import (
	"errors"
	"fmt"
)

// DiskSpace is not implemented here: the free-space guard stays off.
func DiskSpace(dir string) (free, total uint64, err error) {
	return 0, 0, fmt.Errorf("free space of %s: %w", dir, errors.ErrUnsupported)
}
