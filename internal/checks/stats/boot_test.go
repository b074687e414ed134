package stats

import (
	"math"
	"testing"
)

// TestReplicateSumsKernel: the sums replicateSums computes (with the
// AVX-512 kernel where the CPU has it) equal replicateSumsGo's, the code
// the gate used before the kernel, bit for bit: random keys, weights with
// zeros among them, differences of both signs, chunk lengths from 1 to a
// full chunk and replicate counts odd, even, below and above one kernel
// group and at the goroutine split.
func TestReplicateSumsKernel(t *testing.T) {
	if !haveBootKernel {
		t.Skip("no AVX-512F: replicateSums is replicateSumsGo")
	}
	rng := newTestRand(31)
	for _, n := range []int{1, 2, 7, 64, 333, chunk} {
		for _, reps := range []int{1, 2, 3, 15, 16, 17, 31, 64, 127, 128, 200, 257} {
			keys, wv, wdv := make([]uint64, n), make([]float64, n), make([]float64, n)
			for i := range keys {
				keys[i] = rng.Uint64()
				w := 0.25 + 1.5*rng.Float64()
				if rng.Intn(10) == 0 {
					w = 0
				}
				if rng.Intn(3) == 0 {
					w = 1
				}
				wv[i] = w
				wdv[i] = w * rng.NormFloat64() * math.Pow(10, float64(rng.Intn(7)-3))
			}
			got, want := make([]float64, 2*reps), make([]float64, 2*reps)
			for i := range got {
				got[i] = math.NaN() // every sum must be written
			}
			replicateSums(keys, wv, wdv, got, reps)
			replicateSumsGo(keys, wv, wdv, want, reps)
			for j := range want {
				if math.Float64bits(got[j]) != math.Float64bits(want[j]) {
					t.Fatalf("n %d, %d replicates: sum %d of replicate %d is %v, want %v", n, reps, j%2, j/2, got[j], want[j])
				}
			}
		}
	}
}

// TestReplicateSumsKernelTail: keys whose draws reach the rare Poisson
// counts (4 and more, u >= poissonCDF[3]) in some lane give the same counts
// as poisson1: each replicate's Σk over a single row is its count.
func TestReplicateSumsKernelTail(t *testing.T) {
	const reps = 32
	seen := map[uint64]bool{}
	for key := uint64(0); key < 20000 && len(seen) < 9; key++ {
		acc := make([]float64, 2*reps)
		replicateSums([]uint64{key}, []float64{1}, []float64{-2}, acc, reps)
		for r := range reps {
			k := poissonDraw(key, r)
			seen[k] = true
			if acc[2*r] != float64(k) || acc[2*r+1] != -2*float64(k) {
				t.Fatalf("key %d replicate %d: sums %v, %v for draw %d", key, r, acc[2*r], acc[2*r+1], k)
			}
		}
	}
	if len(seen) < 9 {
		t.Errorf("counts seen %v: the tail was not reached", seen)
	}
}
