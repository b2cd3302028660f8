package main

import (
	"bytes"
	"runtime"
	"runtime/debug"
	"strings"
	"testing"
)

// info is the build information the toolchain embeds, with the settings
// given as key, value pairs.
func info(mainVersion string, kv ...string) *debug.BuildInfo {
	bi := &debug.BuildInfo{GoVersion: "go1.26.8", Main: debug.Module{Path: "github.com/plenum-engine/plenum", Version: mainVersion}}
	for i := 0; i+1 < len(kv); i += 2 {
		bi.Settings = append(bi.Settings, debug.BuildSetting{Key: kv[i], Value: kv[i+1]})
	}
	return bi
}

func TestReadBuild(t *testing.T) {
	const rev = "aa28eca3801b99d518cfd6baf6b8dfc0d7c0f57b"
	for _, tc := range []struct {
		name                string
		ldVersion, ldCommit string
		ldDate              string
		bi                  *debug.BuildInfo
		want                string
	}{
		{"release: the stamps win over the toolchain's",
			"v0.2.0-3-gaa28eca", rev, "2026-12-02T07:21:47Z",
			info("(devel)", "GOOS", "linux", "GOARCH", "arm64", "vcs.revision", "0000000000000000000000000000000000000000", "vcs.time", "2000-01-01T00:00:00Z"),
			"plenum v0.2.0-3-gaa28eca commit " + rev + " date 2026-12-02T07:21:47Z go1.26.8 linux/arm64"},
		{"release for a Pi Zero names GOARM",
			"v0.2.0", rev, "2026-12-02T07:21:47Z",
			info("(devel)", "GOOS", "linux", "GOARCH", "arm", "GOARM", "6"),
			"plenum v0.2.0 commit " + rev + " date 2026-12-02T07:21:47Z go1.26.8 linux/arm GOARM=6"},
		{"GOARM is named for arm only",
			"v0.2.0", rev, "2026-12-02T07:21:47Z",
			info("(devel)", "GOOS", "linux", "GOARCH", "amd64", "GOARM", "7"),
			"plenum v0.2.0 commit " + rev + " date 2026-12-02T07:21:47Z go1.26.8 linux/amd64"},
		{"plain go build in a clean checkout: the toolchain's version, commit and time",
			"", "", "",
			info("v0.0.0-20261202072147-aa28eca3801b", "GOOS", "linux", "GOARCH", "amd64", "vcs", "git", "vcs.revision", rev, "vcs.time", "2026-12-02T07:21:47Z", "vcs.modified", "false"),
			"plenum v0.0.0-20261202072147-aa28eca3801b commit " + rev + " date 2026-12-02T07:21:47Z go1.26.8 linux/amd64"},
		{"plain go build with uncommitted changes says dirty",
			"", "", "",
			info("v0.0.0-20261202072147-aa28eca3801b+dirty", "GOOS", "linux", "GOARCH", "amd64", "vcs.revision", rev, "vcs.time", "2026-12-02T07:21:47Z", "vcs.modified", "true"),
			"plenum v0.0.0-20261202072147-aa28eca3801b+dirty commit " + rev + "-dirty date 2026-12-02T07:21:47Z go1.26.8 linux/amd64"},
		{"go run: devel, no commit",
			"", "", "",
			info("(devel)", "GOOS", "linux", "GOARCH", "amd64"),
			"plenum devel commit unknown date unknown go1.26.8 linux/amd64"},
		{"a version stamp alone keeps the toolchain's commit",
			"v0.2.0", "", "",
			info("(devel)", "GOOS", "linux", "GOARCH", "amd64", "vcs.revision", rev, "vcs.time", "2026-12-02T07:21:47Z"),
			"plenum v0.2.0 commit " + rev + " date 2026-12-02T07:21:47Z go1.26.8 linux/amd64"},
		{"no build information at all",
			"", "", "", nil,
			"plenum devel commit unknown date unknown unknown unknown/unknown"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if got := readBuild(tc.ldVersion, tc.ldCommit, tc.ldDate, tc.bi).String(); got != tc.want {
				t.Errorf("got  %q\nwant %q", got, tc.want)
			}
		})
	}
}

func TestVersionCommandNamesToolchainAndPlatform(t *testing.T) {
	var out, errb bytes.Buffer
	if code := run([]string{"version"}, &out, &errb); code != 0 {
		t.Fatalf("version exited %d: %s", code, errb.String())
	}
	line := strings.TrimSuffix(out.String(), "\n")
	if strings.Contains(line, "\n") {
		t.Errorf("version printed more than one line: %q", out.String())
	}
	for _, want := range []string{"plenum ", " commit ", " date ", " " + runtime.Version() + " ", " " + runtime.GOOS + "/" + runtime.GOARCH} {
		if !strings.Contains(line, want) {
			t.Errorf("version line %q lacks %q", line, want)
		}
	}
}
