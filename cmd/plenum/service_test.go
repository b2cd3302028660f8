package main

import (
	"errors"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/sdnotify"
)

// reloadOver reads the file again: keys that apply live are returned,
// anything else is a refusal saying why (no file, a file that fails the
// check, a key that needs a restart).
func TestReloadOver(t *testing.T) {
	dir := t.TempDir()
	file := filepath.Join(dir, "plenum.yaml")
	text := string(demoConfig) + "state_dir: " + dir + "\n"
	if err := os.WriteFile(file, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	cur, err := config.Load(file)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name, path, text string
		live             []string
		why              string // "": applied
		cause            bool   // the refusal carries the check's error
	}{
		{"unchanged", file, text, nil, "", false},
		{"log level", file, text + "log_level: warn\n", []string{"log_level"}, "", false},
		{"listener", file, strings.Replace(text, "listen: 127.0.0.1:9108", "listen: 127.0.0.1:9999", 1), nil, "http.listen changed: restart needed", false},
		{"invalid", file, text + "log_level: loud\n", nil, "the new file does not pass the check", true},
		{"no file", "", "", nil, "this daemon has no configuration file to read again", false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if tc.path != "" {
				if err := os.WriteFile(tc.path, []byte(tc.text), 0o600); err != nil {
					t.Fatal(err)
				}
			}
			nc, live, err := service{configPath: tc.path}.reloadOver(cur)
			if tc.why == "" {
				if err != nil || nc == nil || !slices.Equal(live, tc.live) {
					t.Fatalf("got %v, %q, %v; want the new configuration with %q changed", nc != nil, live, err, tc.live)
				}
				return
			}
			ref, ok := errors.AsType[*sdnotify.Refusal](err)
			if !ok || nc != nil || !strings.HasPrefix(ref.Why, tc.why) || (ref.Err != nil) != tc.cause {
				t.Fatalf("got %v, %v; want a refusal %q (with a cause: %v)", nc != nil, err, tc.why, tc.cause)
			}
		})
	}
}
