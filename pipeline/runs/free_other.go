//go:build !linux

package runs

import (
	"errors"
	"fmt"
)

// freeBytes is not implemented here: the free-space guard stays off.
func freeBytes(dir string) (uint64, error) {
	return 0, fmt.Errorf("free space of %s: %w", dir, errors.ErrUnsupported)
}
