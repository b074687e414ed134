//go:build crashpoints

package retain

import (
	"os"
	"time"

	"github.com/modelgate/modelgate/internal/crashpoint"
)

// envTestNow, in the crash suite's build only, sets the collector's clock
// (RFC 3339), so that a store written seconds ago can be collected as if
// it were months old.
const envTestNow = "MODELGATE_TEST_NOW"

func testNow() time.Time {
	t, _ := time.Parse(time.RFC3339, os.Getenv(envTestNow))
	return t
}

// crashPoint marks a step of a collection that the crash suite kills the
// process after (see package crashpoint).
func crashPoint(step string) { crashpoint.Step(step) }
