package main

import (
	"runtime/debug"
	"strings"
)

// The release script (deploy/release) sets these with
// -ldflags "-X main.version=… -X main.commit=… -X main.date=…". Empty, they
// are taken from the build information the Go toolchain embeds.
var version, commit, date string

// buildStamp is what a binary knows of how it was built.
type buildStamp struct {
	Version, Commit, Date string
	Go, OS, Arch, ARM     string // ARM: GOARM, for GOARCH=arm only
}

// readBuild combines the link-time stamps with the toolchain's build
// information bi (nil when the binary has none): a stamp wins; without one
// a plain go build in a checkout still names its commit (with "-dirty" for
// uncommitted changes) and its time, and go run says "devel".
func readBuild(ldVersion, ldCommit, ldDate string, bi *debug.BuildInfo) buildStamp {
	b := buildStamp{Version: ldVersion, Commit: ldCommit, Date: ldDate}
	set := map[string]string{}
	if bi != nil {
		b.Go = bi.GoVersion
		for _, s := range bi.Settings {
			set[s.Key] = s.Value
		}
		if b.Version == "" && bi.Main.Version != "" && bi.Main.Version != "(devel)" {
			b.Version = bi.Main.Version
		}
	}
	if b.Commit == "" && set["vcs.revision"] != "" {
		b.Commit = set["vcs.revision"]
		if set["vcs.modified"] == "true" {
			b.Commit += "-dirty"
		}
	}
	if b.Date == "" {
		b.Date = set["vcs.time"]
	}
	b.OS, b.Arch, b.ARM = set["GOOS"], set["GOARCH"], set["GOARM"]
	if b.Version == "" {
		b.Version = "devel"
	}
	for _, f := range []*string{&b.Commit, &b.Date, &b.Go, &b.OS, &b.Arch} {
		if *f == "" {
			*f = "unknown"
		}
	}
	return b
}

// String is the line plenum version prints.
func (b buildStamp) String() string {
	var s strings.Builder
	s.WriteString("plenum " + b.Version + " commit " + b.Commit + " date " + b.Date + " " + b.Go + " " + b.OS + "/" + b.Arch)
	if b.Arch == "arm" && b.ARM != "" {
		s.WriteString(" GOARM=" + b.ARM)
	}
	return s.String()
}

// thisBuild is the running binary's build.
func thisBuild() buildStamp {
	bi, _ := debug.ReadBuildInfo()
	return readBuild(version, commit, date, bi)
}
