//go:build linux

package checks

import (
	"time"

	"golang.org/x/sys/unix"
)

// threadCPU reads the CPU time of the calling thread (the caller locks its
// goroutine to the thread). A thread that waits for a core does not accrue
// it, so a busy machine does not stretch it the way it stretches wall time.
func threadCPU() time.Duration {
	var ts unix.Timespec
	_ = unix.ClockGettime(unix.CLOCK_THREAD_CPUTIME_ID, &ts)
	return time.Duration(ts.Nano())
}

// requestClock returns the clock latency is measured on and its name: the
// thread's CPU time, or wall time where the kernel refuses that clock.
func requestClock() (func() time.Duration, string) {
	var ts unix.Timespec
	if err := unix.ClockGettime(unix.CLOCK_THREAD_CPUTIME_ID, &ts); err != nil {
		return wallClock()
	}
	return threadCPU, "thread CPU time"
}
