//go:build crashpoints

package crashpoint

import (
	"os"
	"strconv"
	"strings"
	"sync"
	"syscall"
)

// EnvCrashAt names the step to be killed after, as STEP:N.
const EnvCrashAt = "MODELGATE_TEST_CRASH_AT"

var counts = struct {
	sync.Mutex
	n map[string]int
}{n: map[string]int{}}

// Step sends the process SIGKILL the N-th time it passes the step
// $MODELGATE_TEST_CRASH_AT names.
func Step(step string) {
	name, nth, ok := strings.Cut(os.Getenv(EnvCrashAt), ":")
	if !ok || name != step {
		return
	}
	want, err := strconv.Atoi(nth)
	if err != nil {
		return
	}
	counts.Lock()
	counts.n[step]++
	hit := counts.n[step] == want
	counts.Unlock()
	if hit {
		_ = syscall.Kill(os.Getpid(), syscall.SIGKILL)
		select {}
	}
}
