package kernel

import (
	"fmt"
	"math"
	"math/rand/v2"
	"sync"
	"testing"
)

// unit is the float32 unit roundoff, 2^-24.
const unit = 1.0 / (1 << 24)

var acts = []Activation{Identity, ReLU, Sigmoid, Tanh}

func randSlice(rng *rand.Rand, n int) []float32 {
	x := make([]float32, n)
	for i := range x {
		x[i] = float32(rng.NormFloat64())
	}
	return x
}

// refAct applies an activation in float64.
func refAct(x float64, act Activation) float64 {
	switch act {
	case ReLU:
		return math.Max(x, 0)
	case Sigmoid:
		return 1 / (1 + math.Exp(-x))
	case Tanh:
		return math.Tanh(x)
	}
	return x
}

// checkClose compares got with a float64 reference. scale is the sum of the
// absolute values of the terms (products and bias) and terms their count: the
// float32 accumulation error of a sum of `terms` terms is at most about
// 2·terms·u·scale (product and sum each rounded once per step; a fused
// multiply-add only does better), and the activations used here are
// 1-Lipschitz, with one final rounding of the result.
func checkClose(t *testing.T, what string, got float32, ref, scale float64, terms int) {
	t.Helper()
	tol := 2*float64(terms+2)*unit*scale + 4*unit*math.Abs(ref) + 1e-30
	if d := math.Abs(float64(got) - ref); !(d <= tol) {
		t.Fatalf("%s: got %g, want %g (|diff| %g > tol %g)", what, got, ref, d, tol)
	}
}

// denseRef computes the m×n reference of Dense in float64, with the scale of each element.
func denseRef(m, n, k int, a []float32, lda int, bt func(p, j int) float32, bias []float32, act Activation) (ref, scale []float64) {
	ref = make([]float64, m*n)
	scale = make([]float64, m*n)
	for i := 0; i < m; i++ {
		for j := 0; j < n; j++ {
			var s, abs float64
			for p := 0; p < k; p++ {
				prod := float64(a[i*lda+p]) * float64(bt(p, j))
				s += prod
				abs += math.Abs(prod)
			}
			if bias != nil {
				s += float64(bias[j])
				abs += math.Abs(float64(bias[j]))
			}
			ref[i*n+j] = refAct(s, act)
			scale[i*n+j] = abs
		}
	}
	return ref, scale
}

// run calls f with each backend this CPU supports, as the active one.
func run(t *testing.T, f func(t *testing.T, be *backend)) {
	t.Helper()
	for _, be := range backends() {
		t.Run(be.name, func(t *testing.T) {
			saved := active
			active = be
			defer func() { active = saved }()
			f(t, be)
		})
	}
}

func TestFeatures(t *testing.T) {
	got := Features()
	switch got {
	case "avx512", "avx2+fma", "generic":
	default:
		t.Fatalf("Features() = %q", got)
	}
	names := ""
	for _, be := range backends() {
		names += " " + be.name
	}
	t.Logf("active path %s; testable paths:%s", got, names)
	if backends()[len(backends())-1] != generic {
		t.Fatal("the generic path is not always available")
	}
}

var sizes = []int{1, 2, 3, 5, 7, 16, 17, 33, 64, 100, 257}

func TestDenseMatchesReference(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		rng := rand.New(rand.NewPCG(1, 2))
		for _, m := range []int{1, 2, 5, 7, 13} {
			for _, n := range sizes {
				for _, k := range sizes {
					act := acts[rng.IntN(len(acts))]
					lda, ldc := k+rng.IntN(3), n+rng.IntN(3)
					a := randSlice(rng, (m-1)*lda+k)
					b := randSlice(rng, k*n)
					var bias []float32
					if rng.IntN(2) == 0 {
						bias = randSlice(rng, n)
					}
					c := randSlice(rng, (m-1)*ldc+n) // garbage to be overwritten
					Dense(m, n, k, a, lda, b, bias, c, ldc, act)
					ref, scale := denseRef(m, n, k, a, lda, func(p, j int) float32 { return b[p*n+j] }, bias, act)
					for i := 0; i < m; i++ {
						for j := 0; j < n; j++ {
							what := fmt.Sprintf("m=%d n=%d k=%d %v bias=%t c[%d,%d]", m, n, k, act, bias != nil, i, j)
							checkClose(t, what, c[i*ldc+j], ref[i*n+j], scale[i*n+j], k)
						}
					}
				}
			}
		}
	})
}

func TestDenseLeavesPaddingAlone(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		rng := rand.New(rand.NewPCG(3, 4))
		for _, n := range []int{1, 15, 17, 63, 65, 100} {
			m, k, ldc := 9, 20, n+5
			a := randSlice(rng, m*k)
			b := randSlice(rng, k*n)
			c := make([]float32, m*ldc)
			for i := range c {
				c[i] = 42
			}
			Dense(m, n, k, a, k, b, nil, c[:(m-1)*ldc+n], ldc, ReLU)
			for i := 0; i < m; i++ {
				for j := n; j < ldc; j++ {
					if c[i*ldc+j] != 42 {
						t.Fatalf("n=%d: c[%d,%d] = %g, written outside the output", n, i, j, c[i*ldc+j])
					}
				}
			}
		}
	})
}

func TestDenseEmptyReduction(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		bias := []float32{-1, 0, 2}
		c := []float32{9, 9, 9, 9, 9, 9}
		Dense(2, 3, 0, nil, 0, nil, bias, c, 3, ReLU)
		want := []float32{0, 0, 2, 0, 0, 2}
		for i := range want {
			if c[i] != want[i] {
				t.Fatalf("c = %v, want %v", c, want)
			}
		}
		Dense(2, 3, 0, nil, 0, nil, nil, c, 3, Sigmoid)
		for i := range c {
			if c[i] != 0.5 {
				t.Fatalf("sigmoid of an empty sum: c = %v, want all 0.5", c)
			}
		}
	})
}

func TestActivations(t *testing.T) {
	// One input column, identity weight 1: the output is act(x) of each row's value.
	xs := []float32{-3, -1, -0.5, 0, 0.25, 1, 4, 30, -30}
	run(t, func(t *testing.T, be *backend) {
		for _, act := range acts {
			c := make([]float32, len(xs))
			Dense(len(xs), 1, 1, xs, 1, []float32{1}, nil, c, 1, act)
			for i, x := range xs {
				want := refAct(float64(x), act)
				if d := math.Abs(float64(c[i]) - want); d > 2*unit*math.Abs(want) {
					t.Errorf("%v(%g) = %g, want %g", act, x, c[i], want)
				}
			}
		}
		// Exact values: relu clips to +0, sigmoid(0) = 1/2, tanh(0) = 0.
		c := make([]float32, 3)
		Dense(3, 1, 1, []float32{-2, 0, 2}, 1, []float32{1}, nil, c, 1, ReLU)
		if c[0] != 0 || math.Signbit(float64(c[0])) || c[1] != 0 || c[2] != 2 {
			t.Errorf("relu(-2, 0, 2) = %v", c)
		}
	})
}

func TestDensePackedAndTransposed(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		rng := rand.New(rand.NewPCG(5, 6))
		for _, n := range []int{1, 7, 16, 63, 64, 65, 100, 130} {
			for _, k := range []int{1, 5, 33, 100} {
				m := 11
				a := randSlice(rng, m*k)
				b := randSlice(rng, k*n)
				bias := randSlice(rng, n)
				plain := make([]float32, m*n)
				packed := make([]float32, m*n)
				Dense(m, n, k, a, k, b, bias, plain, n, ReLU)
				p := PackB(k, n, b)
				if p.K() != k || p.N() != n {
					t.Fatalf("PackB(%d, %d) has shape %d×%d", k, n, p.K(), p.N())
				}
				DensePacked(m, a, k, p, bias, packed, n, ReLU)
				sameBits(t, fmt.Sprintf("packed n=%d k=%d", n, k), plain, packed)

				// w is n×k; DenseT multiplies by its transpose.
				w := make([]float32, n*k)
				for j := 0; j < n; j++ {
					for q := 0; q < k; q++ {
						w[j*k+q] = b[q*n+j]
					}
				}
				tied := make([]float32, m*n)
				DenseT(m, n, k, a, k, w, bias, tied, n, ReLU)
				sameBits(t, fmt.Sprintf("transposed n=%d k=%d", n, k), plain, tied)
				tiedPacked := make([]float32, m*n)
				DensePacked(m, a, k, PackBT(k, n, w), bias, tiedPacked, n, ReLU)
				sameBits(t, fmt.Sprintf("packed transposed n=%d k=%d", n, k), plain, tiedPacked)

				ref, scale := denseRef(m, n, k, a, k, func(q, j int) float32 { return w[j*k+q] }, bias, ReLU)
				for i := range ref {
					checkClose(t, fmt.Sprintf("DenseT n=%d k=%d elem %d", n, k, i), tied[i], ref[i], scale[i], k)
				}
			}
		}
	})
}

func sameBits(t *testing.T, what string, want, got []float32) {
	t.Helper()
	if len(want) != len(got) {
		t.Fatalf("%s: %d values, want %d", what, len(got), len(want))
	}
	for i := range want {
		if math.Float32bits(want[i]) != math.Float32bits(got[i]) {
			t.Fatalf("%s: element %d is %g (bits %#x), want %g (bits %#x)", what, i,
				got[i], math.Float32bits(got[i]), want[i], math.Float32bits(want[i]))
		}
	}
}

// TestDenseRowIndependence checks the determinism contract: a row's output is
// bit-identical whether it is computed alone, inside the batch, at another
// position of another batch, or in a chunk of any split, also across goroutines.
func TestDenseRowIndependence(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		rng := rand.New(rand.NewPCG(7, 8))
		for _, shape := range [][2]int{{100, 67}, {256, 300}, {17, 1}, {1, 64}, {65, 129}} {
			n, k := shape[0], shape[1]
			const m = 41
			a := randSlice(rng, m*k)
			b := randSlice(rng, k*n)
			bias := randSlice(rng, n)
			p := PackB(k, n, b)
			for _, act := range acts {
				full := make([]float32, m*n)
				Dense(m, n, k, a, k, b, bias, full, n, act)
				what := fmt.Sprintf("n=%d k=%d %v", n, k, act)

				// Each row alone, and packed.
				for i := 0; i < m; i++ {
					one := make([]float32, n)
					Dense(1, n, k, a[i*k:(i+1)*k], k, b, bias, one, n, act)
					sameBits(t, fmt.Sprintf("%s row %d alone", what, i), full[i*n:(i+1)*n], one)
					DensePacked(1, a[i*k:(i+1)*k], k, p, bias, one, n, act)
					sameBits(t, fmt.Sprintf("%s row %d alone packed", what, i), full[i*n:(i+1)*n], one)
				}

				// Random splits into chunks, computed by concurrent goroutines.
				for trial := 0; trial < 4; trial++ {
					split := make([]float32, m*n)
					var wg sync.WaitGroup
					for lo, hi := 0, 0; lo < m; lo = hi {
						hi = min(m, lo+1+rng.IntN(9))
						wg.Go(func() {
							Dense(hi-lo, n, k, a[lo*k:], k, b, bias, split[lo*n:], n, act)
						})
					}
					wg.Wait()
					sameBits(t, fmt.Sprintf("%s split %d", what, trial), full, split)
				}

				// Row 0 placed at every position of a batch of other rows, with strides.
				const m2 = 13
				lda, ldc := k+3, n+2
				other := randSlice(rng, m2*lda)
				for pos := 0; pos < m2; pos++ {
					batch := append([]float32(nil), other...)
					copy(batch[pos*lda:pos*lda+k], a[:k])
					out := make([]float32, m2*ldc)
					Dense(m2, n, k, batch, lda, b, bias, out, ldc, act)
					sameBits(t, fmt.Sprintf("%s row 0 at position %d", what, pos), full[:n], out[pos*ldc:pos*ldc+n])
				}
			}
		}
	})
}

// csr is a random sparse block.
type csr struct {
	indptr []int32
	idx    []int32
	vals   []float32
}

func randCSR(rng *rand.Rand, rows, vocab, maxNNZ int) csr {
	s := csr{indptr: []int32{0}}
	for r := 0; r < rows; r++ {
		nnz := rng.IntN(maxNNZ + 1)
		if r%5 == 0 {
			nnz = 0 // empty rows occur
		}
		for e := 0; e < nnz; e++ {
			s.idx = append(s.idx, int32(rng.IntN(vocab)))
			s.vals = append(s.vals, float32(rng.NormFloat64()))
		}
		s.indptr = append(s.indptr, int32(len(s.idx)))
	}
	return s
}

func TestSparseDenseMatchesReference(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		rng := rand.New(rand.NewPCG(9, 10))
		for _, n := range []int{1, 3, 8, 15, 16, 17, 100, 255, 256, 257, 1024, 1031} {
			const vocab = 50
			s := randCSR(rng, 23, vocab, 12)
			// Repeated indices in a row are kept and summed like any other term.
			s.idx[1] = s.idx[0]
			w := randSlice(rng, vocab*n)
			for _, act := range acts {
				var bias []float32
				if act != Tanh {
					bias = randSlice(rng, n)
				}
				ldc := n + rng.IntN(4)
				rows := len(s.indptr) - 1
				c := randSlice(rng, (rows-1)*ldc+n)
				SparseDense(s.indptr, s.idx, s.vals, w, n, bias, c, ldc, act)
				for r := 0; r < rows; r++ {
					for j := 0; j < n; j++ {
						var sum, abs float64
						for e := s.indptr[r]; e < s.indptr[r+1]; e++ {
							prod := float64(s.vals[e]) * float64(w[int(s.idx[e])*n+j])
							sum += prod
							abs += math.Abs(prod)
						}
						if bias != nil {
							sum += float64(bias[j])
							abs += math.Abs(float64(bias[j]))
						}
						what := fmt.Sprintf("n=%d %v row %d col %d", n, act, r, j)
						checkClose(t, what, c[r*ldc+j], refAct(sum, act), abs, int(s.indptr[r+1]-s.indptr[r]))
					}
				}
			}
		}
	})
}

func TestSparseDenseRowIndependence(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		rng := rand.New(rand.NewPCG(11, 12))
		const vocab, n = 300, 1000
		s := randCSR(rng, 57, vocab, 20)
		w := randSlice(rng, vocab*n)
		bias := randSlice(rng, n)
		rows := len(s.indptr) - 1
		full := make([]float32, rows*n)
		SparseDense(s.indptr, s.idx, s.vals, w, n, bias, full, n, ReLU)
		for r := 0; r < rows; r++ {
			lo, hi := s.indptr[r], s.indptr[r+1]
			one := make([]float32, n)
			SparseDense([]int32{0, hi - lo}, s.idx[lo:hi], s.vals[lo:hi], w, n, bias, one, n, ReLU)
			sameBits(t, fmt.Sprintf("row %d alone", r), full[r*n:(r+1)*n], one)
			// The same row inside a block whose indptr does not start at zero.
			shifted := make([]float32, 2*n)
			SparseDense([]int32{0, lo, hi}, s.idx, s.vals, w, n, bias, shifted, n, ReLU)
			sameBits(t, fmt.Sprintf("row %d after an offset", r), full[r*n:(r+1)*n], shifted[n:])
		}
	})
}

// TestPathsAgree runs every available path on the same inputs: they must agree
// to rounding error (fused and unfused multiply-adds round differently).
func TestPathsAgree(t *testing.T) {
	bes := backends()
	if len(bes) < 2 {
		t.Logf("only the %s path runs on this CPU", bes[0].name)
	}
	rng := rand.New(rand.NewPCG(13, 14))
	m, n, k := 50, 200, 300
	a := randSlice(rng, m*k)
	b := randSlice(rng, k*n)
	bias := randSlice(rng, n)
	s := randCSR(rng, m, 400, 30)
	wSparse := randSlice(rng, 400*n)
	outs := make([][]float32, len(bes))
	sparse := make([][]float32, len(bes))
	for i, be := range bes {
		outs[i] = make([]float32, m*n)
		be.dense(m, n, k, a, k, matrix{data: b, k: k, n: n}, bias, outs[i], n, Sigmoid)
		sparse[i] = make([]float32, m*n)
		be.sparse(s.indptr, s.idx, s.vals, wSparse, n, bias, sparse[i], n, Identity)
	}
	for i := 1; i < len(bes); i++ {
		for e := range outs[0] {
			// Sigmoid outputs lie in (0, 1); the pre-activation sums are O(sqrt(k)).
			if d := math.Abs(float64(outs[i][e] - outs[0][e])); d > 1e-5 {
				t.Fatalf("dense: %s and %s differ by %g at %d", bes[0].name, bes[i].name, d, e)
			}
			if d := math.Abs(float64(sparse[i][e] - sparse[0][e])); d > 1e-5*(1+math.Abs(float64(sparse[0][e]))) {
				t.Fatalf("sparse: %s and %s differ by %g at %d", bes[0].name, bes[i].name, d, e)
			}
		}
	}
}

func TestShapeErrorsPanic(t *testing.T) {
	cases := map[string]func(){
		"short c": func() {
			Dense(2, 3, 2, make([]float32, 4), 2, make([]float32, 6), nil, make([]float32, 5), 3, Identity)
		},
		"short a": func() {
			Dense(2, 3, 2, make([]float32, 3), 2, make([]float32, 6), nil, make([]float32, 6), 3, Identity)
		},
		"short b": func() {
			Dense(2, 3, 2, make([]float32, 4), 2, make([]float32, 5), nil, make([]float32, 6), 3, Identity)
		},
		"short bias": func() {
			Dense(2, 3, 2, make([]float32, 4), 2, make([]float32, 6), make([]float32, 2), make([]float32, 6), 3, Identity)
		},
		"small ldc": func() {
			Dense(2, 3, 2, make([]float32, 4), 2, make([]float32, 6), nil, make([]float32, 6), 2, Identity)
		},
		"sparse index outside w": func() {
			SparseDense([]int32{0, 1}, []int32{1}, []float32{1}, make([]float32, 4), 4, nil, make([]float32, 4), 4, Identity)
		},
		"sparse negative index": func() {
			SparseDense([]int32{0, 1}, []int32{-1}, []float32{1}, make([]float32, 8), 4, nil, make([]float32, 4), 4, Identity)
		},
		"sparse decreasing indptr": func() {
			SparseDense([]int32{0, 1, 0, 1}, []int32{0}, []float32{1}, make([]float32, 4), 4, nil, make([]float32, 12), 4, Identity)
		},
		"sparse short indices": func() {
			SparseDense([]int32{0, 3}, []int32{0}, []float32{1}, make([]float32, 4), 4, nil, make([]float32, 4), 4, Identity)
		},
	}
	for name, f := range cases {
		t.Run(name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Fatal("no panic")
				}
			}()
			f()
		})
	}
}

// TestDenseAcrossCacheBlocks uses a product large enough to span several row
// chunks and column blocks of the cache blocking: rows on either side of a chunk
// boundary must still equal themselves computed alone, and match the reference.
func TestDenseAcrossCacheBlocks(t *testing.T) {
	run(t, func(t *testing.T, be *backend) {
		rng := rand.New(rand.NewPCG(15, 16))
		m, n, k := 600, 200, 1024
		a := randSlice(rng, m*k)
		b := randSlice(rng, k*n)
		bias := randSlice(rng, n)
		full := make([]float32, m*n)
		p := PackB(k, n, b)
		DensePacked(m, a, k, p, bias, full, n, Sigmoid)
		ref, scale := denseRef(m, n, k, a, k, func(q, j int) float32 { return b[q*n+j] }, bias, Sigmoid)
		for i := range ref {
			checkClose(t, fmt.Sprintf("element %d", i), full[i], ref[i], scale[i], k)
		}
		for _, i := range []int{0, 1, 41, 42, 251, 252, 253, 503, 504, 599} {
			one := make([]float32, n)
			Dense(1, n, k, a[i*k:], k, b, bias, one, n, Sigmoid)
			sameBits(t, fmt.Sprintf("row %d alone", i), full[i*n:(i+1)*n], one)
		}
		tail := make([]float32, 7*n)
		DensePacked(7, a[593*k:], k, p, bias, tail, n, Sigmoid)
		sameBits(t, "last seven rows", full[593*n:], tail)
	})
}

// FuzzDenseShapes tries arbitrary small shapes, strides and activations on every
// path: each must match the reference, and each row must equal itself alone.
func FuzzDenseShapes(f *testing.F) {
	f.Add(uint8(7), uint8(17), uint8(33), uint8(1), uint8(2), uint8(1), uint64(1))
	f.Add(uint8(1), uint8(65), uint8(1), uint8(0), uint8(0), uint8(3), uint64(2))
	f.Add(uint8(13), uint8(130), uint8(64), uint8(5), uint8(0), uint8(2), uint64(3))
	f.Fuzz(func(t *testing.T, m8, n8, k8, padA, padC, act8 uint8, seed uint64) {
		m, n, k := int(m8%40)+1, int(n8)+1, int(k8)
		lda, ldc := k+int(padA%4), n+int(padC%4)
		act := acts[int(act8)%len(acts)]
		rng := rand.New(rand.NewPCG(seed, 99))
		a := randSlice(rng, (m-1)*lda+k)
		b := randSlice(rng, k*n)
		var bias []float32
		if seed%2 == 0 {
			bias = randSlice(rng, n)
		}
		ref, scale := denseRef(m, n, k, a, lda, func(p, j int) float32 { return b[p*n+j] }, bias, act)
		for _, be := range backends() {
			c := make([]float32, (m-1)*ldc+n)
			be.dense(m, n, k, a, lda, matrix{data: b, k: k, n: n}, bias, c, ldc, act)
			for i := 0; i < m; i++ {
				for j := 0; j < n; j++ {
					checkClose(t, fmt.Sprintf("%s c[%d,%d]", be.name, i, j), c[i*ldc+j], ref[i*n+j], scale[i*n+j], k)
				}
				one := make([]float32, n)
				be.dense(1, n, k, a[i*lda:], lda, matrix{data: b, k: k, n: n}, bias, one, n, act)
				sameBits(t, fmt.Sprintf("%s row %d alone", be.name, i), c[i*ldc:i*ldc+n], one)
			}
		}
	})
}
