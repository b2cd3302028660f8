package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// FuzzReadSamples: any recording gives samples in time order with valid
// keys, or an error naming the file; never a panic.
func FuzzReadSamples(f *testing.F) {
	good, err := os.ReadFile("testdata/short-run.lp")
	if err != nil {
		f.Fatal(err)
	}
	f.Add(good)
	f.Add([]byte("plenum,channel=engine_speed,source=m value=3000,quality=\"ok\" 5\nplenum,channel=engine_speed,source=m value=2000 4\n"))
	f.Add([]byte("plenum_event,kind=turbo_lag,run=r t90_seconds=0.8 1\n"))
	f.Add([]byte("plenum,channel=x value=1i 1\nplenum,channel=\\ x\\,y value=\"s\" 2\n"))
	dir := f.TempDir()
	f.Fuzz(func(t *testing.T, data []byte) {
		path := filepath.Join(dir, "in.lp")
		if err := os.WriteFile(path, data, 0o644); err != nil {
			t.Fatal(err)
		}
		rec, err := readSamples([]string{path}, true)
		if err != nil {
			if !strings.Contains(err.Error(), path) {
				t.Fatalf("error does not name the file: %v", err)
			}
			return
		}
		for i, s := range rec.samples {
			if int(s.key) >= len(rec.keys) {
				t.Fatalf("sample %d has key %d of %d", i, s.key, len(rec.keys))
			}
			if i > 0 && s.ns < rec.samples[i-1].ns {
				t.Fatalf("samples out of time order at %d", i)
			}
		}
	})
}
