//go:build linux

// Package cputime measures CPU time for benchmarks: on a shared machine a
// thread's CPU time is steadier than wall time, since waiting for a core
// does not count.
package cputime

import (
	"runtime"
	"syscall"
	"time"
)

// Thread starts measuring the CPU time of the calling goroutine's thread
// (it locks the goroutine to it); the returned function stops, unlocks and
// returns the time.
func Thread() func() time.Duration {
	runtime.LockOSThread()
	start := usage(syscall.RUSAGE_THREAD)
	return func() time.Duration {
		d := usage(syscall.RUSAGE_THREAD) - start
		runtime.UnlockOSThread()
		return d
	}
}

// Process is the CPU time the process used so far, all threads.
func Process() time.Duration { return usage(syscall.RUSAGE_SELF) }

func usage(who int) time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(who, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
