package checks

import "time"

// wallClock is the monotonic wall clock, the fallback of requestClock.
func wallClock() (func() time.Duration, string) {
	start := time.Now()
	return func() time.Duration { return time.Since(start) }, "wall time"
}
