package kernel

import (
	"math"
	"math/rand/v2"
	"testing"
)

// The shapes of the benchmark model in the project's performance notes:
// B = 20,000 rows, sparse 6,000 → 1,024 (relu), dense 1,024 → 256 (relu).
const (
	benchRows  = 20000
	benchVocab = 6000
	benchWide  = 1024
	benchCode  = 256
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
			m = 2000 // a tenth of the rows: the generic path is slow
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

// benchCSR draws the benchmark's sparse rows: a geometric number of nonzeros
// (mean 4.5, capped at 40), Zipf(1.1) ids over the vocabulary, log1p of counts 1..200.
func benchCSR(rows int) csr {
	rng := rand.New(rand.NewPCG(3, 3))
	zipf := rand.NewZipf(rng, 1.1, 1, benchVocab-1)
	s := csr{indptr: make([]int32, 1, rows+1)}
	for r := 0; r < rows; r++ {
		nnz := 1
		for nnz < 40 && rng.Float64() > 1/4.5 {
			nnz++
		}
		for e := 0; e < nnz; e++ {
			s.idx = append(s.idx, int32(zipf.Uint64()))
			s.vals = append(s.vals, float32(math.Log1p(float64(1+rng.IntN(200)))))
		}
		s.indptr = append(s.indptr, int32(len(s.idx)))
	}
	return s
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
		// The whole 20,000×1,024 output at once: bound by writing it to memory.
		b.Run("whole", func(b *testing.B) {
			SparseDense(s.indptr, s.idx, s.vals, w, benchWide, bias, c, benchWide, ReLU) // fault the pages in
			for b.Loop() {
				SparseDense(s.indptr, s.idx, s.vals, w, benchWide, bias, c, benchWide, ReLU)
			}
			reportGFLOPs(b, flops)
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/1e6, "ms/pass")
		})
		// Blocks of 64 rows into one reused 64×1,024 buffer that stays in L2, as
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

// BenchmarkDenseInCache runs one full tile (6 rows × 64 columns, k = 256) whose
// operands stay in L1: it estimates the kernel's ceiling on this CPU, against
// which the large products can be judged.
func BenchmarkDenseInCache(b *testing.B) {
	rng := rand.New(rand.NewPCG(5, 5))
	m, n, k := 6, 64, 256
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

// BenchmarkDenseTied is the decoder tied to the sparse layer's weight: 1,024 →
// 6,000 through the transpose of the 6,000×1,024 encoder weight, packed once.
func BenchmarkDenseTied(b *testing.B) {
	rng := rand.New(rand.NewPCG(6, 6))
	m, n, k := 2000, benchVocab, benchWide
	a := randSlice(rng, m*k)
	w := randSlice(rng, n*k)
	p := PackBT(k, n, w)
	c := make([]float32, m*n)
	benchBackend(b, func(b *testing.B) {
		m := m
		if active == generic {
			m = 200
		}
		DensePacked(m, a, k, p, nil, c, n, Identity) // fault the pages in
		for b.Loop() {
			DensePacked(m, a, k, p, nil, c, n, Identity)
		}
		reportGFLOPs(b, 2*float64(m)*float64(n)*float64(k))
	})
}
