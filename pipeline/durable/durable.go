// Package durable replaces small files so that a power cut at any moment
// leaves either the old content or the new content, whole, under the name.
//
// A replace of path goes in four steps; what a power cut during or after
// each step leaves behind (on a journalling file system such as ext4 in
// its default data=ordered mode, or any file system that honours fsync on
// files and directories):
//
//  1. <path>.tmp is created (a stale one from an earlier cut is removed
//     first) and the content written to it. A cut here leaves path as it
//     was and at most a partial <path>.tmp.
//  2. <path>.tmp is fsynced and closed. From here its content is on the
//     disk; a cut leaves path as it was and a whole <path>.tmp.
//  3. <path>.tmp is renamed over path. A cut before the next step may come
//     back with either the old path (and the whole <path>.tmp) or the new
//     one: never an empty or torn path, since the content is on the disk
//     before the name points at it.
//  4. The directory is fsynced. From here the new content is path for good
//     and no <path>.tmp is left.
//
// A leftover <path>.tmp is never read by this package; the next replace of
// the same path removes it. Callers that replace one path from several
// goroutines must serialise the calls: the temporary name is fixed.
package durable

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
)

// WriteFile replaces path with data, durably (see the package comment):
// when it returns nil, the new content survives a power cut. perm is the
// new file's mode before the umask, as for os.WriteFile, and holds also
// when path existed with another mode. On any error path is left as it was,
// no <path>.tmp created by this call is left behind, and the error, which
// names path, wraps the cause.
func WriteFile(path string, data []byte, perm fs.FileMode) error {
	return Write(path, perm, func(w io.Writer) error {
		_, err := w.Write(data)
		return err
	})
}

// Write is WriteFile for content produced by fill, which writes it to w
// (buffered; flushed when fill returns nil). An error from fill ends the
// replace: path is left as it was, and the error returned wraps fill's.
func Write(path string, perm fs.FileMode, fill func(w io.Writer) error) error {
	tmp := path + ".tmp"
	f, err := create(tmp, perm)
	if err != nil {
		return fmt.Errorf("durable: replace %s: %w", path, err)
	}
	fail := func(err error) error {
		f.Close()
		os.Remove(tmp)
		return fmt.Errorf("durable: replace %s: %w", path, err)
	}
	bw := bufio.NewWriterSize(f, 32<<10)
	if err := fill(bw); err != nil {
		return fail(fmt.Errorf("content: %w", err))
	}
	if err := bw.Flush(); err != nil {
		return fail(err)
	}
	if err := f.Sync(); err != nil {
		return fail(err)
	}
	if err := f.Close(); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("durable: replace %s: %w", path, err)
	}
	if err := os.Rename(tmp, path); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("durable: replace %s: %w", path, err)
	}
	if err := SyncDir(filepath.Dir(path)); err != nil {
		// The rename is done; only its durability is in doubt.
		return fmt.Errorf("durable: replace %s: %w", path, err)
	}
	return nil
}

// create makes a new file at tmp with perm (less the umask). A regular
// file already there (left by a cut) is removed first; anything else there,
// such as a directory, is an error and is left alone.
func create(tmp string, perm fs.FileMode) (*os.File, error) {
	f, err := os.OpenFile(tmp, os.O_CREATE|os.O_EXCL|os.O_WRONLY, perm)
	if err == nil || !errors.Is(err, fs.ErrExist) {
		return f, err
	}
	st, lerr := os.Lstat(tmp)
	if lerr != nil {
		return nil, lerr
	}
	if !st.Mode().IsRegular() {
		return nil, fmt.Errorf("%s: %w", tmp, err)
	}
	if err := os.Remove(tmp); err != nil {
		return nil, err
	}
	return os.OpenFile(tmp, os.O_CREATE|os.O_EXCL|os.O_WRONLY, perm)
}

// SyncDir fsyncs the directory dir, making the creations, renames and
// removals of names in it durable. Its errors are those of os.Open and
// (*os.File).Sync, which name dir.
func SyncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	if err := d.Sync(); err != nil {
		d.Close()
		return err
	}
	return d.Close()
}
