package stats

import (
	"runtime"
	"syscall"
	"testing"
	"time"
)

func cpuTime() time.Duration {
	var ru syscall.Rusage
	_ = syscall.Getrusage(syscall.RUSAGE_THREAD, &ru)
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

func BenchmarkXPaired(b *testing.B) {
	r := makeScored(1, 100_000)
	d := r.diffs(0, 100_000)
	acc, _ := NewPaired(1, 1000)
	runtime.LockOSThread()
	defer runtime.UnlockOSThread()
	best := time.Hour
	for b.Loop() {
		c0 := cpuTime()
		for s := 0; s < 100_000; s += 4096 {
			e := min(s+4096, 100_000)
			_ = acc.AddBatch(r.ids[s:e], d[s:e], r.w[s:e])
		}
		best = min(best, cpuTime()-c0)
	}
	b.ReportMetric(b.Elapsed().Seconds()*1e9/(float64(b.N)*100_000*1000), "ns/draw")
	b.ReportMetric(best.Seconds()*1e9/(100_000*1000), "cpu-ns/draw")
}
