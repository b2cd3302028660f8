// Package recordtest provides a disk for testing the recorder and its
// callers: in memory, with a fixed amount of free space.
package recordtest

import (
	"path/filepath"
	"sync"
	"syscall"
)

// Disk is a disk with a fixed amount of free space: a write beyond it is
// taken in part and refused with ENOSPC, as a full filesystem does. A
// failing fsync can be switched on. Its Create serves as record.Config's
// Create. Safe for concurrent use.
type Disk struct {
	mu      sync.Mutex
	free    int64
	syncErr error
	files   map[string]*File
	writes  int
}

// File is a file on a Disk; it implements record.File.
type File struct {
	d    *Disk
	data []byte
}

// NewDisk returns an empty disk with free bytes of room.
func NewDisk(free int64) *Disk { return &Disk{free: free, files: map[string]*File{}} }

// Create makes a new empty file named by path's base name.
func (d *Disk) Create(path string) (*File, error) {
	d.mu.Lock()
	defer d.mu.Unlock()
	f := &File{d: d}
	d.files[filepath.Base(path)] = f
	return f, nil
}

// SetFree sets the free space, as freeing or filling the disk does.
func (d *Disk) SetFree(n int64) {
	d.mu.Lock()
	d.free = n
	d.mu.Unlock()
}

// SetSyncErr makes every fsync fail with err (nil: succeed).
func (d *Disk) SetSyncErr(err error) {
	d.mu.Lock()
	d.syncErr = err
	d.mu.Unlock()
}

// Data returns a copy of the named file's contents (nil when there is none).
func (d *Disk) Data(name string) []byte {
	d.mu.Lock()
	defer d.mu.Unlock()
	if f := d.files[name]; f != nil {
		return append([]byte(nil), f.data...)
	}
	return nil
}

// Writes returns the number of write calls, refused or not.
func (d *Disk) Writes() int {
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.writes
}

// Write appends what fits and refuses the rest with ENOSPC.
func (f *File) Write(b []byte) (int, error) {
	f.d.mu.Lock()
	defer f.d.mu.Unlock()
	f.d.writes++
	n := min(int64(len(b)), max(f.d.free, 0))
	f.data = append(f.data, b[:n]...)
	f.d.free -= n
	if int(n) < len(b) {
		return int(n), syscall.ENOSPC
	}
	return int(n), nil
}

// Truncate cuts the file back to size bytes, freeing the rest.
func (f *File) Truncate(size int64) error {
	f.d.mu.Lock()
	defer f.d.mu.Unlock()
	f.d.free += int64(len(f.data)) - size
	f.data = f.data[:size]
	return nil
}

// Sync fails with the disk's sync error, if any.
func (f *File) Sync() error {
	f.d.mu.Lock()
	defer f.d.mu.Unlock()
	return f.d.syncErr
}

// Close does nothing.
func (f *File) Close() error { return nil }
