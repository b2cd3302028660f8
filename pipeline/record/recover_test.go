package record

import (
	"bytes"
	"log/slog"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// RecoverAtStart finishes compressions cut short, cuts and marks runs cut
// short, hands those runs to cutShort, and logs each thing done and each
// error as the daemon always has; runs that ended normally are left alone.
func TestRecoverAtStart(t *testing.T) {
	for _, tc := range []struct {
		name     string
		mk       func(t *testing.T, dir string) string // leaves the state behind; returns the dir to recover
		cutShort []string
		log      []string // the lines, in order, without times
	}{
		{"nothing to do", func(t *testing.T, dir string) string {
			recordRun(t, dir, "ended", 50, 0)
			return dir
		}, nil, nil},
		{"no directory yet", func(t *testing.T, dir string) string {
			return filepath.Join(dir, "absent")
		}, nil, nil},
		{"a run and a compression cut short", func(t *testing.T, dir string) string {
			rd, closed := recordRun(t, dir, "crashed", 50, 0)
			if err := os.Remove(filepath.Join(rd, "ended")); err != nil {
				t.Fatal(err)
			}
			f, err := os.OpenFile(closed[0], os.O_APPEND|os.O_WRONLY, 0)
			if err != nil {
				t.Fatal(err)
			}
			f.WriteString("plenum,channel=torn va") // 22 bytes, no newline
			f.Close()
			_, closed = recordRun(t, dir, "ended", 50, 0)
			if err := os.WriteFile(closed[0]+".gz.tmp", []byte("x"), 0o644); err != nil {
				t.Fatal(err)
			}
			return dir
		}, []string{"crashed"}, []string{
			`level=WARN msg="a compression was cut short; finished" file=DIR/ended/0001.lp.gz.tmp action=removed_tmp`,
			`level=WARN msg="a run was cut short; its torn tail was cut and it is marked ended_abnormally" run=crashed cut_bytes=22`,
		}},
		{"not a directory", func(t *testing.T, dir string) string {
			p := filepath.Join(dir, "file")
			if err := os.WriteFile(p, nil, 0o644); err != nil {
				t.Fatal(err)
			}
			return p
		}, nil, []string{
			`level=WARN msg="recovering compressions cut short" err="record: open DIR: not a directory"`,
			`level=WARN msg="recovering earlier runs" err="record: open DIR: not a directory"`,
		}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := tc.mk(t, t.TempDir())
			var logged bytes.Buffer
			log := slog.New(slog.NewTextHandler(&logged, &slog.HandlerOptions{ReplaceAttr: func(groups []string, a slog.Attr) slog.Attr {
				if a.Key == slog.TimeKey && len(groups) == 0 {
					return slog.Attr{}
				}
				return a
			}}))
			var cut []string
			RecoverAtStart(dir, log, func(run string) { cut = append(cut, run) })
			if !slices.Equal(cut, tc.cutShort) {
				t.Errorf("cutShort got %q, want %q", cut, tc.cutShort)
			}
			var want string
			for _, l := range tc.log {
				want += strings.ReplaceAll(l, "DIR", dir) + "\n"
			}
			if logged.String() != want {
				t.Errorf("log:\n%s\nwant:\n%s", logged.String(), want)
			}
			for _, run := range tc.cutShort {
				if !exists(filepath.Join(dir, run, "ended_abnormally")) {
					t.Errorf("%s is not marked ended_abnormally", run)
				}
			}
			if exists(filepath.Join(dir, "ended", "ended_abnormally")) {
				t.Error("the run that ended normally was marked")
			}
			// A second start finds nothing left to do.
			logged.Reset()
			cut = nil
			RecoverAtStart(dir, nil, nil)
			RecoverAtStart(dir, log, func(run string) { cut = append(cut, run) })
			if len(cut) != 0 || (logged.Len() != 0 && tc.name != "not a directory") {
				t.Errorf("a second start: cut %q, logged %q", cut, logged.String())
			}
		})
	}
}
