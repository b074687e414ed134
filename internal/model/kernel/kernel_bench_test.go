package kernel

import (
	"math"
	"math/rand/v2"
	"runtime"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/demo/listening"
)

// The shapes of the runtime benchmark's workload (a podcast network at
// production scale, invented for the benchmark): a batch of 16,384
// listeners; sparse 32,768 shows + the unknown bucket → 768 (relu); dense
// 768 → 128 (relu), the code; the scorer head concat(code, 16 features)
// 144 → 48 (relu) → 1.
const (
	benchRows     = 16384
	benchShows    = 32768
	benchVocab    = benchShows + 1 // weight rows: every show and the unknown bucket
	benchWide     = 768
	benchCode     = 128
	benchFeatures = 16
	benchHead     = 48
)

// benchBackend runs f with be as the active path.
func benchBackend(b *testing.B, f func(b *testing.B)) {
	for _, be := range backends() {
		b.Run(be.name, func(b *testing.B) {
			saved := active
			active = be
			defer func() { active = saved }()
			f(b)
		})
	}
}

func reportGFLOPs(b *testing.B, flops float64) {
	b.ReportMetric(flops*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
}

func BenchmarkDense(b *testing.B) {
	rng := rand.New(rand.NewPCG(1, 1))
	m, n, k := benchRows, benchCode, benchWide
	a := make([]float32, m*k)
	for i := range a {
		a[i] = max(0, float32(rng.NormFloat64())) // relu outputs of the sparse layer
	}
	w := randSlice(rng, k*n)
	bias := randSlice(rng, n)
	c := make([]float32, m*n)
	p := PackB(k, n, w)
	flops := 2 * float64(m) * float64(n) * float64(k)
	benchBackend(b, func(b *testing.B) {
		if active == generic {
			m = benchRows / 8 // the generic path is slow
		} else {
			m = benchRows
		}
		flops := flops * float64(m) / benchRows
		b.Run("rowmajor", func(b *testing.B) {
			Dense(m, n, k, a, k, w, bias, c, n, ReLU) // fault the pages in
			for b.Loop() {
				Dense(m, n, k, a, k, w, bias, c, n, ReLU)
			}
			reportGFLOPs(b, flops)
		})
		b.Run("packed", func(b *testing.B) {
			for b.Loop() {
				DensePacked(m, a, k, p, bias, c, n, ReLU)
			}
			reportGFLOPs(b, flops)
		})
	})
}

// BenchmarkDenseOneRow measures the single-row case (a row scored alone).
func BenchmarkDenseOneRow(b *testing.B) {
	rng := rand.New(rand.NewPCG(2, 2))
	n, k := benchCode, benchWide
	a := randSlice(rng, k)
	w := randSlice(rng, k*n)
	p := PackB(k, n, w)
	c := make([]float32, n)
	benchBackend(b, func(b *testing.B) {
		for b.Loop() {
			DensePacked(1, a, k, p, nil, c, n, ReLU)
		}
		reportGFLOPs(b, 2*float64(n)*float64(k))
	})
}

// benchCSR draws the benchmark's sparse rows from the demo's listening
// model (package listening) over the benchmark's catalogue: log1p of the
// episodes played, show ids by Zipf-like popularity.
func benchCSR(rows int) csr {
	indptr, idx, plays := listening.Default().Rows(rand.New(rand.NewPCG(3, 3)), rows, benchShows)
	for i, v := range plays {
		plays[i] = float32(math.Log1p(float64(v)))
	}
	return csr{indptr: indptr, idx: idx, vals: plays}
}

func BenchmarkSparseDense(b *testing.B) {
	rng := rand.New(rand.NewPCG(4, 4))
	s := benchCSR(benchRows)
	w := randSlice(rng, benchVocab*benchWide)
	bias := randSlice(rng, benchWide)
	c := make([]float32, benchRows*benchWide)
	flops := 2 * float64(len(s.idx)) * benchWide
	b.Logf("%.2f nonzeros per row", float64(len(s.idx))/benchRows)
	benchBackend(b, func(b *testing.B) {
		// The whole 16,384×768 output at once: bound by writing it to memory.
		b.Run("whole", func(b *testing.B) {
			SparseDense(s.indptr, s.idx, s.vals, w, benchWide, bias, c, benchWide, ReLU) // fault the pages in
			for b.Loop() {
				SparseDense(s.indptr, s.idx, s.vals, w, benchWide, bias, c, benchWide, ReLU)
			}
			reportGFLOPs(b, flops)
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/1e6, "ms/pass")
		})
		// Blocks of 64 rows into one reused 64×768 buffer that stays in L2, as
		// a runtime that feeds each block straight to the next layer would call it.
		b.Run("blocks64", func(b *testing.B) {
			const block = 64
			out := c[:block*benchWide]
			for b.Loop() {
				for lo := 0; lo < benchRows; lo += block {
					hi := min(lo+block, benchRows)
					SparseDense(s.indptr[lo:hi+1], s.idx, s.vals, w, benchWide, bias, out, benchWide, ReLU)
				}
			}
			reportGFLOPs(b, flops)
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/1e6, "ms/pass")
		})
	})
}

// BenchmarkDenseInCache runs one full tile (6 rows × 64 columns, k = 192) whose
// operands stay in L1: it estimates the kernel's own ceiling on this CPU (see
// BenchmarkFMAPeak for the machine's).
func BenchmarkDenseInCache(b *testing.B) {
	rng := rand.New(rand.NewPCG(5, 5))
	m, n, k := 6, 64, 192
	a := randSlice(rng, m*k)
	p := PackB(k, n, randSlice(rng, k*n))
	c := make([]float32, m*n)
	benchBackend(b, func(b *testing.B) {
		for b.Loop() {
			for range 100 {
				DensePacked(m, a, k, p, nil, c, n, Identity)
			}
		}
		reportGFLOPs(b, 100*2*float64(m)*float64(n)*float64(k))
	})
}

// BenchmarkDenseTied is a decoder tied to the sparse layer's weight: 768 →
// 32,769 through the transpose of the 32,769×768 encoder weight, packed once,
// for 256 rows.
func BenchmarkDenseTied(b *testing.B) {
	rng := rand.New(rand.NewPCG(6, 6))
	m, n, k := 256, benchVocab, benchWide
	a := randSlice(rng, m*k)
	w := randSlice(rng, n*k)
	p := PackBT(k, n, w)
	c := make([]float32, m*n)
	benchBackend(b, func(b *testing.B) {
		m := m
		if active == generic {
			m = 32
		}
		DensePacked(m, a, k, p, nil, c, n, Identity) // fault the pages in
		for b.Loop() {
			DensePacked(m, a, k, p, nil, c, n, Identity)
		}
		reportGFLOPs(b, 2*float64(m)*float64(n)*float64(k))
	})
}

// BenchmarkFMAPeak measures the machine's float32 FMA peak on the active
// path: GOMAXPROCS goroutines (use -cpu 1,2), each running fused
// multiply-adds on registers alone. The dense layers' GFLOP/s
// (BenchmarkDenseLayers, same -cpu) read as a share of it.
func BenchmarkFMAPeak(b *testing.B) {
	f, flop := fmaPeak()
	if f == nil {
		b.Skipf("the %s path has no peak loop", active.name)
	}
	const rounds = 1 << 18 // about a millisecond at 200 GFLOP/s
	threads := runtime.GOMAXPROCS(0)
	b.ResetTimer()
	var wg sync.WaitGroup
	for range threads {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for range b.N {
				f(rounds)
			}
		}()
	}
	wg.Wait()
	reportGFLOPs(b, float64(threads)*rounds*flop)
	b.Logf("kernel path %s, %d threads", active.name, threads)
}

// BenchmarkDenseLayers runs the workload's dense layers as the runtime does
// (packed weight, bias, relu) over all 16,384 rows, split evenly across
// GOMAXPROCS goroutines (use -cpu 1,2): the code layer 768 → 128, which is
// about 90% of the forward pass's arithmetic, and the head's 144 → 48.
func BenchmarkDenseLayers(b *testing.B) {
	for _, l := range []struct {
		name string
		k, n int
	}{
		{"code-768x128", benchWide, benchCode},
		{"head-144x48", benchCode + benchFeatures, benchHead},
	} {
		b.Run(l.name, func(b *testing.B) {
			rng := rand.New(rand.NewPCG(7, uint64(l.k)))
			m, k, n := benchRows, l.k, l.n
			a := make([]float32, m*k)
			for i := range a {
				a[i] = max(0, float32(rng.NormFloat64())) // relu outputs of the layer before
			}
			p := PackB(k, n, randSlice(rng, k*n))
			bias := randSlice(rng, n)
			c := make([]float32, m*n)
			threads := runtime.GOMAXPROCS(0)
			per := (m + threads - 1) / threads
			pass := func() {
				var wg sync.WaitGroup
				for lo := 0; lo < m; lo += per {
					rows := min(per, m-lo)
					wg.Add(1)
					go func() {
						defer wg.Done()
						DensePacked(rows, a[lo*k:], k, p, bias, c[lo*n:], n, ReLU)
					}()
				}
				wg.Wait()
			}
			pass() // fault the pages in
			b.ResetTimer()
			for b.Loop() {
				pass()
			}
			reportGFLOPs(b, 2*float64(m)*float64(n)*float64(k))
		})
	}
}
