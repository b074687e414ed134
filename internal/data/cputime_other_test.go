//go:build !linux

package data

import "time"

// threadCPU falls back to wall time where thread CPU time is not at hand.
func threadCPU() func() time.Duration {
	start := time.Now()
	return func() time.Duration { return time.Since(start) }
}

// processCPU falls back to wall time since the package was loaded.
func processCPU() time.Duration { return time.Since(loaded) }

var loaded = time.Now()
