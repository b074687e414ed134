//go:build !linux

// Package cputime measures CPU time for benchmarks: on a shared machine a
// thread's CPU time is steadier than wall time, since waiting for a core
// does not count.
package cputime

import "time"

// Thread falls back to wall time where thread CPU time is not at hand.
func Thread() func() time.Duration {
	start := time.Now()
	return func() time.Duration { return time.Since(start) }
}

// Process falls back to wall time since the package was loaded.
func Process() time.Duration { return time.Since(loaded) }

var loaded = time.Now()
