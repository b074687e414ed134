// Package version holds modelgate's version, recorded in every artifact it
// writes and every gate report.
package version

import (
	"runtime/debug"
	"strings"
)

// dev is the version of a build from a work tree.
const dev = "0.1.0-dev"

// Version is the tool version. Release builds set it with -ldflags
// "-X <module path>/internal/version.Version=…"; otherwise a binary built by
// `go install MODULE/cmd/modelgate@VERSION` takes the module's version
// from its build information, and a build from a work tree says dev (the
// go command stamps such builds with a version made from the commit, and
// a vcs.* setting beside it: those are left alone, so that every build from
// one tree records the same version).
var Version = dev

func init() {
	if Version != dev {
		return
	}
	bi, ok := debug.ReadBuildInfo()
	if !ok || bi.Main.Version == "" || bi.Main.Version == "(devel)" {
		return
	}
	for _, s := range bi.Settings {
		if strings.HasPrefix(s.Key, "vcs") {
			return
		}
	}
	Version = bi.Main.Version
}
