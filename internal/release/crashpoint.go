//go:build !crashpoints

package release

// crashPoint marks a step of a release that the crash suite kills the
// process after (built with -tags crashpoints); a no-op otherwise.
func crashPoint(string) {}
