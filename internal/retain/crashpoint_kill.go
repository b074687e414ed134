//go:build crashpoints

package retain

import (
	"os"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"
)

// envCrashAt, in a binary built with -tags crashpoints (the crash suite's
// own build, never a release), names the step after which the process
// sends itself SIGKILL: STEP:N, the N-th time it passes crashPoint(STEP).
// The same variable as the release path's crash points.
const envCrashAt = "MODELGATE_TEST_CRASH_AT"

// envTestNow, in the crash suite's build only, sets the collector's clock
// (RFC 3339), so that a store written seconds ago can be collected as if
// it were months old.
const envTestNow = "MODELGATE_TEST_NOW"

func testNow() time.Time {
	t, _ := time.Parse(time.RFC3339, os.Getenv(envTestNow))
	return t
}

var crashCounts = struct {
	sync.Mutex
	n map[string]int
}{n: map[string]int{}}

func crashPoint(step string) {
	name, nth, ok := strings.Cut(os.Getenv(envCrashAt), ":")
	if !ok || name != step {
		return
	}
	want, err := strconv.Atoi(nth)
	if err != nil {
		return
	}
	crashCounts.Lock()
	crashCounts.n[step]++
	hit := crashCounts.n[step] == want
	crashCounts.Unlock()
	if hit {
		_ = syscall.Kill(os.Getpid(), syscall.SIGKILL)
		select {}
	}
}
