//go:build !crashpoints

package retain

import "time"

// crashPoint marks a step of a collection that the crash suite kills the
// process after (built with -tags crashpoints); a no-op otherwise.
func crashPoint(string) {}

// testNow is the zero time: the collector reads the real clock.
func testNow() time.Time { return time.Time{} }
