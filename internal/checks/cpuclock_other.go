//go:build !linux

package checks

import "time"

// requestClock returns the clock latency is measured on and its name: wall
// time on this platform (no per-thread CPU clock is used).
func requestClock() (func() time.Duration, string) { return wallClock() }
