//go:build linux

package data

import (
	"runtime"
	"syscall"
	"time"
)

// threadCPU starts measuring the CPU time of the calling goroutine's
// thread (it locks the goroutine to it); the returned function stops and
// returns the time. On a shared machine this is steadier than wall time.
func threadCPU() func() time.Duration {
	runtime.LockOSThread()
	start := rusageThread()
	return func() time.Duration {
		d := rusageThread() - start
		runtime.UnlockOSThread()
		return d
	}
}

func rusageThread() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_THREAD, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// processCPU is the CPU time the process used so far, all threads.
func processCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
