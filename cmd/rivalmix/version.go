package main

import (
	"context"
	"fmt"
	"io"
	"runtime/debug"

	"rivalmix/stream"
)

// runVersion prints the module version and, when the binary was built
// from a version-controlled checkout, the revision it was built from, as
// recorded in the build info.
func runVersion(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("version", "", "Prints the version this binary was built from (module version, source revision, Go version).", stderr)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	fmt.Fprintln(stdout, versionLine())
	return nil
}

// versionLine describes the build: "rivalmix (devel) revision 3b14426c1a2f
// 2026-12-01T17:00:00Z, modified, go1.26.8".
func versionLine() string {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "rivalmix (no build information)"
	}
	line := "rivalmix " + bi.Main.Version
	var rev, at, dirty string
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.time":
			at = s.Value
		case "vcs.modified":
			if s.Value == "true" {
				dirty = ", modified"
			}
		}
	}
	if rev != "" {
		line += fmt.Sprintf(" revision %.12s %s%s", rev, at, dirty)
	}
	return line + ", " + bi.GoVersion
}

// buildInfo is the build as the rivalmix_build_info metric labels it;
// fields the build did not record stay empty.
func buildInfo() stream.BuildInfo {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return stream.BuildInfo{}
	}
	out := stream.BuildInfo{Version: bi.Main.Version, GoVersion: bi.GoVersion}
	for _, s := range bi.Settings {
		if s.Key == "vcs.revision" {
			out.Revision = s.Value
		}
	}
	return out
}
