package stats

import (
	"fmt"
	"runtime"
	"testing"
	"time"

	"github.com/modelgate/modelgate/internal/cputime"
)

const benchRows = 1_000_000

func benchScored() scoredRows { return makeScored(1, benchRows) }

// reportRows reports rows/s by wall time and by the thread's CPU time
// (cpu is what cputime.Thread measured over the b.Loop): the machine is shared,
// so wall time includes other processes' turns.
func reportRows(b *testing.B, rows int, cpu time.Duration) {
	b.ReportMetric(float64(rows)*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	b.ReportMetric(float64(rows)*float64(b.N)/cpu.Seconds(), "cpu-rows/s")
}

// BenchmarkBinaryAddBatch: log loss, calibration and AUC histogram over
// 1M float32 rows in batches of 4,096.
func BenchmarkBinaryAddBatch(b *testing.B) {
	r := benchScored()
	soft := make([]float32, benchRows)
	for i := range soft {
		soft[i] = 0.5 * r.y[i]
	}
	for _, c := range []struct {
		name string
		y    []float32
	}{{"labels01", r.y}, {"soft", soft}} {
		b.Run(c.name, func(b *testing.B) {
			acc := NewBinary()
			b.ReportAllocs()
			stop := cputime.Thread()
			for b.Loop() {
				for s := 0; s < benchRows; s += 4096 {
					e := min(s+4096, benchRows)
					if err := acc.AddBatch(r.cand[s:e], c.y[s:e], r.w[s:e]); err != nil {
						b.Fatal(err)
					}
				}
			}
			reportRows(b, benchRows, stop())
		})
	}
}

// BenchmarkBinaryAddBatchMany: each batch of 4,096 rows added to 12
// accumulators in turn, as a gate adds its rows overall and per slice for
// two models (12 MiB of AUC histograms, more than a core's cache).
func BenchmarkBinaryAddBatchMany(b *testing.B) {
	r := benchScored()
	accs := make([]*Binary, 12)
	for i := range accs {
		accs[i] = NewBinary()
	}
	stop := cputime.Thread()
	for b.Loop() {
		for s := 0; s < benchRows; s += 4096 {
			e := min(s+4096, benchRows)
			for _, acc := range accs {
				if err := acc.AddBatch(r.cand[s:e], r.y[s:e], r.w[s:e]); err != nil {
					b.Fatal(err)
				}
			}
		}
	}
	reportRows(b, benchRows*len(accs), stop())
}

// BenchmarkPairedAddBatch: the paired accumulator over 1M rows with R
// bootstrap replicates (R draws per row).
func BenchmarkPairedAddBatch(b *testing.B) {
	r := benchScored()
	d := r.diffs(0, benchRows)
	for _, reps := range []int{0, 200, 1000} {
		b.Run(fmt.Sprintf("R=%d", reps), func(b *testing.B) {
			acc, _ := NewPaired(1, reps)
			b.ReportAllocs()
			stop := cputime.Thread()
			for b.Loop() {
				for s := 0; s < benchRows; s += 4096 {
					e := min(s+4096, benchRows)
					if err := acc.AddBatch(r.ids[s:e], d[s:e], r.w[s:e]); err != nil {
						b.Fatal(err)
					}
				}
			}
			cpu := stop()
			reportRows(b, benchRows, cpu)
			if reps > 0 {
				b.ReportMetric(cpu.Seconds()*1e9/(float64(b.N)*benchRows*float64(reps)), "cpu-ns/draw")
			}
		})
	}
}

// BenchmarkRecon: 10,000 rows of 8,192 outputs with about 5 nonzero
// targets each (a sparse activity row).
func BenchmarkRecon(b *testing.B) {
	const rows, width = 10_000, 8_192
	rng := newTestRand(4)
	q, tg := make([]float32, rows*width), make([]float32, rows*width)
	for i := range q {
		q[i] = float32(0.001 + 0.2*rng.Float64())
	}
	for i := range rows {
		for range 5 {
			tg[i*width+rng.Intn(width)] = 1
		}
	}
	loss := make([]float64, rows)
	acc, _ := NewRecon(0.5, nil)
	b.ReportAllocs()
	stop := cputime.Thread()
	for b.Loop() {
		if err := acc.AddBatch(q, tg, width, loss); err != nil {
			b.Fatal(err)
		}
	}
	reportRows(b, rows, stop())
}

// BenchmarkReplicateSums: the bootstrap's sums over one chunk of 1,024
// rows with the gate's 200 replicates, by the kernel replicateSums uses on
// this CPU and by replicateSumsGo (the code before the kernel), on one
// goroutine each (GOMAXPROCS 1 for the run: no split across cores), so
// that the two compare per row and per draw in one run.
func BenchmarkReplicateSums(b *testing.B) {
	const reps = 200
	rng := newTestRand(5)
	keys, wv, wdv := make([]uint64, chunk), make([]float64, chunk), make([]float64, chunk)
	for i := range keys {
		keys[i] = rng.Uint64()
		wv[i] = 0.25 + 1.5*rng.Float64()
		wdv[i] = wv[i] * rng.NormFloat64()
	}
	acc := make([]float64, 2*reps)
	for _, c := range []struct {
		name string
		f    func(keys []uint64, wv, wdv, acc []float64, reps int)
	}{{"go", replicateSumsGo}, {"dispatch", replicateSums}} {
		b.Run(c.name, func(b *testing.B) {
			defer runtime.GOMAXPROCS(runtime.GOMAXPROCS(1))
			stop := cputime.Thread()
			for b.Loop() {
				c.f(keys, wv, wdv, acc, reps)
			}
			cpu := stop()
			b.ReportMetric(cpu.Seconds()*1e9/(float64(b.N)*chunk), "cpu-ns/row")
			b.ReportMetric(cpu.Seconds()*1e9/(float64(b.N)*chunk*reps), "cpu-ns/draw")
		})
	}
}

// BenchmarkBinaryAddBatchWithLoss: as BenchmarkBinaryAddBatchMany, with
// the rows' log losses known (AddBatchWithLoss, what the gate's slices
// take): the histograms, calibration bins and sums alone.
func BenchmarkBinaryAddBatchWithLoss(b *testing.B) {
	r := benchScored()
	accs := make([]*Binary, 12)
	for i := range accs {
		accs[i] = NewBinary()
	}
	loss := make([]float64, benchRows)
	if err := NewBinary().AddBatchLoss(r.cand, r.y, r.w, loss); err != nil {
		b.Fatal(err)
	}
	stop := cputime.Thread()
	for b.Loop() {
		for s := 0; s < benchRows; s += 4096 {
			e := min(s+4096, benchRows)
			for _, acc := range accs {
				if err := acc.AddBatchWithLoss(r.cand[s:e], r.y[s:e], r.w[s:e], loss[s:e]); err != nil {
					b.Fatal(err)
				}
			}
		}
	}
	cpu := stop()
	reportRows(b, benchRows*len(accs), cpu)
	b.ReportMetric(cpu.Seconds()*1e9/(float64(b.N)*benchRows*float64(len(accs))), "cpu-ns/row")
}

// BenchmarkGateStatistics: the statistics a scorer's gate computes per
// row, on 1M rows in batches of 4,096: the paired accumulator with the
// gate's 200 bootstrap replicates, six Binary accumulators with the losses
// known (the candidate and baseline overall and in two slices) and the
// histogram of differences. "go" runs the bootstrap's Go loop, "kernel"
// what replicateSums picks on this CPU; the rest is the same code.
func BenchmarkGateStatistics(b *testing.B) {
	r := benchScored()
	d := r.diffs(0, benchRows)
	loss := make([]float64, benchRows)
	if err := NewBinary().AddBatchLoss(r.cand, r.y, r.w, loss); err != nil {
		b.Fatal(err)
	}
	for _, c := range []struct {
		name   string
		kernel bool
	}{{"go", false}, {"kernel", haveBootKernel}} {
		b.Run(c.name, func(b *testing.B) {
			defer func(k bool) { haveBootKernel = k }(haveBootKernel)
			haveBootKernel = c.kernel
			paired, _ := NewPaired(1, DefaultReplicates)
			hist, _ := NewHistogram(-0.5, 0.5, 50)
			accs := make([]*Binary, 6)
			for i := range accs {
				accs[i] = NewBinary()
			}
			stop := cputime.Thread()
			for b.Loop() {
				for s := 0; s < benchRows; s += 4096 {
					e := min(s+4096, benchRows)
					if err := paired.AddBatch(r.ids[s:e], d[s:e], r.w[s:e]); err != nil {
						b.Fatal(err)
					}
					if err := hist.AddBatch(d[s:e], r.w[s:e]); err != nil {
						b.Fatal(err)
					}
					for _, acc := range accs {
						if err := acc.AddBatchWithLoss(r.cand[s:e], r.y[s:e], r.w[s:e], loss[s:e]); err != nil {
							b.Fatal(err)
						}
					}
				}
			}
			cpu := stop()
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/(float64(b.N)*benchRows), "ns/row")
			b.ReportMetric(cpu.Seconds()*1e9/(float64(b.N)*benchRows), "thread-cpu-ns/row")
		})
	}
}
