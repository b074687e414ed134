package freeze_test

import (
	"context"
	"runtime"
	"runtime/metrics"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/modelgate/modelgate/internal/freeze"
)

// heapPeak samples the live heap every millisecond until stopped and
// returns the largest value seen above the level at start.
func heapPeak() (stop func() uint64) {
	sample := []metrics.Sample{{Name: "/memory/classes/heap/objects:bytes"}}
	read := func() uint64 {
		metrics.Read(sample)
		return sample[0].Value.Uint64()
	}
	runtime.GC()
	base := read()
	var peak atomic.Uint64
	done := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		t := time.NewTicker(time.Millisecond)
		defer t.Stop()
		for {
			if v := read(); v > base && v-base > peak.Load() {
				peak.Store(v - base)
			}
			select {
			case <-done:
				return
			case <-t.C:
			}
		}
	}()
	return func() uint64 {
		close(done)
		wg.Wait()
		return peak.Load()
	}
}

// BenchmarkFreezeOverBudget freezes the demo's largest scorer (the
// over-budget candidate, an 8,192-unit hidden layer) with verification on its
// probes and a 2,000-row holdout sample, and pushes it and its record.
// Metrics: time per freeze, bytes allocated per freeze (B/op), and the
// peak live heap above the starting level (peak-heap-B, sampled every ms).
func BenchmarkFreezeOverBudget(b *testing.B) {
	ctx := context.Background()
	store, _ := demoStore(b)
	ref, out := mustRef(b, "promo-scorer:cand-over-budget"), mustRef(b, "promo-scorer:bench-frozen")
	opts := freeze.Options{Out: out, Holdout: "promo-holdout:v1", HoldoutRows: freeze.DefaultHoldoutRows}
	// One run outside the timing, to check it verifies.
	res, err := freeze.Scorer(ctx, store, ref, opts)
	if err != nil {
		b.Fatal(err)
	}
	if !res.Record.Verification.Passed {
		b.Fatalf("verification: %+v", res.Record.Verification)
	}
	var peak uint64
	b.ReportAllocs()
	b.ResetTimer()
	for b.Loop() {
		b.StopTimer()
		stop := heapPeak()
		b.StartTimer()
		if _, err := freeze.Scorer(ctx, store, ref, opts); err != nil {
			b.Fatal(err)
		}
		b.StopTimer()
		peak = max(peak, stop())
		b.StartTimer()
	}
	b.ReportMetric(float64(peak), "peak-heap-B")
}
