//go:build crashpoints

package release

import (
	"os"
	"strconv"
	"strings"
	"sync"
	"syscall"
)

// EnvCrashAt, in a binary built with -tags crashpoints (the crash suite's
// own build, never a release), names the step after which the process
// sends itself SIGKILL: STEP:N, the N-th time it passes crashPoint(STEP).
const EnvCrashAt = "MODELGATE_TEST_CRASH_AT"

var crashCounts = struct {
	sync.Mutex
	n map[string]int
}{n: map[string]int{}}

func crashPoint(step string) {
	at := os.Getenv(EnvCrashAt)
	name, nth, ok := strings.Cut(at, ":")
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
