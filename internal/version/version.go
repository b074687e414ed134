// Package version holds modelgate's version, recorded in every artifact it
// writes and every gate report.
package version

// Version is the tool version; release builds set it with
// -ldflags "-X modelgate/internal/version.Version=…".
var Version = "0.1.0-dev"
