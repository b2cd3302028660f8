package durable

import (
	"bytes"
	"errors"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func TestWrite(t *testing.T) {
	errFill := errors.New("fill failed")
	cases := []struct {
		name string
		// setup prepares dir and returns the path to replace.
		setup   func(t *testing.T, dir string) string
		fill    func(w io.Writer) error // nil: WriteFile with data
		data    string
		perm    fs.FileMode
		wantErr error // checked with errors.Is when set; an error is wanted when wantAny
		wantAny bool
		want    string // content of path afterwards ("" with keepOld: unchanged)
		keepOld string // path's content before, which must stay on error
	}{
		{
			name:  "new file",
			setup: func(t *testing.T, dir string) string { return filepath.Join(dir, "state") },
			data:  "hello\n", perm: 0o644, want: "hello\n",
		},
		{
			name:  "empty content",
			setup: func(t *testing.T, dir string) string { return filepath.Join(dir, "state") },
			data:  "", perm: 0o644, want: "",
		},
		{
			name: "existing longer file replaced whole",
			setup: func(t *testing.T, dir string) string {
				p := filepath.Join(dir, "state")
				mustWrite(t, p, strings.Repeat("old content ", 100), 0o644)
				return p
			},
			data: "new", perm: 0o644, want: "new",
		},
		{
			name: "existing file's mode replaced by perm",
			setup: func(t *testing.T, dir string) string {
				p := filepath.Join(dir, "state")
				mustWrite(t, p, "old", 0o644)
				return p
			},
			data: "new", perm: 0o600, want: "new",
		},
		{
			name: "stale tmp from a cut is replaced",
			setup: func(t *testing.T, dir string) string {
				p := filepath.Join(dir, "state")
				mustWrite(t, p+".tmp", "torn leftover that is longer", 0o666)
				return p
			},
			data: "fresh", perm: 0o600, want: "fresh",
		},
		{
			name:  "streamed content",
			setup: func(t *testing.T, dir string) string { return filepath.Join(dir, "log") },
			fill: func(w io.Writer) error {
				for i := 0; i < 10000; i++ {
					if _, err := io.WriteString(w, "line of the outbox\n"); err != nil {
						return err
					}
				}
				return nil
			},
			perm: 0o644, want: strings.Repeat("line of the outbox\n", 10000),
		},
		{
			name:  "directory missing",
			setup: func(t *testing.T, dir string) string { return filepath.Join(dir, "absent", "state") },
			data:  "x", perm: 0o644,
			wantErr: fs.ErrNotExist,
		},
		{
			name: "path is a directory",
			setup: func(t *testing.T, dir string) string {
				p := filepath.Join(dir, "state")
				if err := os.Mkdir(p, 0o755); err != nil {
					t.Fatal(err)
				}
				return p
			},
			data: "x", perm: 0o644, wantAny: true,
		},
		{
			name: "tmp name taken by a directory",
			setup: func(t *testing.T, dir string) string {
				p := filepath.Join(dir, "state")
				mustWrite(t, p, "old", 0o644)
				if err := os.Mkdir(p+".tmp", 0o755); err != nil {
					t.Fatal(err)
				}
				return p
			},
			data: "x", perm: 0o644, wantErr: fs.ErrExist, keepOld: "old",
		},
		{
			name: "fill fails after writing part",
			setup: func(t *testing.T, dir string) string {
				p := filepath.Join(dir, "state")
				mustWrite(t, p, "old", 0o644)
				return p
			},
			fill: func(w io.Writer) error {
				io.WriteString(w, strings.Repeat("partial ", 10000))
				return errFill
			},
			perm: 0o644, wantErr: errFill, keepOld: "old",
		},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			path := c.setup(t, dir)
			var err error
			if c.fill != nil {
				err = Write(path, c.perm, c.fill)
			} else {
				err = WriteFile(path, []byte(c.data), c.perm)
			}
			if c.wantErr != nil || c.wantAny {
				if err == nil {
					t.Fatal("no error")
				}
				if c.wantErr != nil && !errors.Is(err, c.wantErr) {
					t.Errorf("error %v does not wrap %v", err, c.wantErr)
				}
				if !strings.Contains(err.Error(), path) {
					t.Errorf("error %q does not name %s", err, path)
				}
				if c.keepOld != "" {
					if b, rerr := os.ReadFile(path); rerr != nil || string(b) != c.keepOld {
						t.Errorf("path holds %q, %v; want the old %q", b, rerr, c.keepOld)
					}
				}
				if st, serr := os.Lstat(path + ".tmp"); serr == nil && st.Mode().IsRegular() {
					t.Error("a temporary file is left behind")
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			b, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			if !bytes.Equal(b, []byte(c.want)) {
				t.Errorf("content %d bytes %.40q…, want %d bytes %.40q…", len(b), b, len(c.want), c.want)
			}
			st, err := os.Stat(path)
			if err != nil {
				t.Fatal(err)
			}
			// The umask may clear group and other bits, never the owner's
			// (a umask that does would make every state file unreadable).
			if got := st.Mode().Perm(); got&0o700 != c.perm&0o700 || got&^c.perm != 0 {
				t.Errorf("mode %v, want %v less the umask", got, c.perm)
			}
			if _, err := os.Lstat(path + ".tmp"); !errors.Is(err, fs.ErrNotExist) {
				t.Errorf("temporary file left behind: %v", err)
			}
			ents, _ := os.ReadDir(filepath.Dir(path))
			if len(ents) != 1 {
				t.Errorf("directory holds %d entries, want only the file", len(ents))
			}
		})
	}
}

// TestWriteFillSeesNoPartialPath checks that while fill runs, path still
// holds the old content: the new one only appears whole, by the rename.
func TestWriteFillSeesNoPartialPath(t *testing.T) {
	path := filepath.Join(t.TempDir(), "cursor")
	mustWrite(t, path, "41\n", 0o644)
	err := Write(path, 0o644, func(w io.Writer) error {
		io.WriteString(w, "4")
		if b, err := os.ReadFile(path); err != nil || string(b) != "41\n" {
			t.Errorf("during the write path holds %q, %v", b, err)
		}
		_, err := io.WriteString(w, "2\n")
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	if b, _ := os.ReadFile(path); string(b) != "42\n" {
		t.Errorf("after: %q", b)
	}
}

func TestSyncDir(t *testing.T) {
	if err := SyncDir(t.TempDir()); err != nil {
		t.Errorf("existing directory: %v", err)
	}
	if err := SyncDir(filepath.Join(t.TempDir(), "absent")); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("missing directory: %v, want ErrNotExist", err)
	}
}

func mustWrite(t *testing.T, path, content string, perm fs.FileMode) {
	t.Helper()
	if err := os.WriteFile(path, []byte(content), perm); err != nil {
		t.Fatal(err)
	}
}
