//go:build amd64 && !purego

package stats

import (
	"runtime"
	"sync"
)

// haveBootKernel reports whether replicateSums uses bootAVX512: the CPU
// has AVX-512F and the operating system saves its registers.
var haveBootKernel = hasAVX512F()

// bootGroup is how many replicates one pass of bootAVX512 over the rows
// computes: 8 generator draws, each giving two replicates.
const bootGroup = 16

// bootAVX512 computes, for the 8 generator steps steps[j] over rows
// [0, n), the Poisson(1) counts k of 16 replicates (replicate 2j from the
// low 32 bits of wymix(keys[i] + steps[j]), 2j+1 from the high 32 bits)
// and writes out[q] = Σ wv[i]·k_q and out[16+q] = Σ wdv[i]·k_q, each sum
// taken in row order from 0 with a float64 product and then a float64
// addition, as replicatePairs does. cdf holds poissonCDF as uint32.
//
//go:noescape
func bootAVX512(keys *uint64, wv, wdv *float64, n int, steps *[8]uint64, cdf *[12]uint32, out *[2 * bootGroup]float64)

func cpuid(eaxArg, ecxArg uint32) (eax, ebx, ecx, edx uint32)
func xgetbv() (eax, edx uint32)

// hasAVX512F checks CPUID leaf 7 for AVX-512F and XCR0 for the opmask and
// ZMM state (Intel SDM vol. 1, 15.2 and 13.3), as golang.org/x/sys/cpu
// does.
func hasAVX512F() bool {
	maxID, _, _, _ := cpuid(0, 0)
	if maxID < 7 {
		return false
	}
	_, _, ecx1, _ := cpuid(1, 0)
	if ecx1&(1<<27) == 0 { // OSXSAVE
		return false
	}
	xcr0, _ := xgetbv()
	// SSE, AVX, opmask, upper halves of ZMM0-15, ZMM16-31.
	if xcr0&0xe6 != 0xe6 {
		return false
	}
	_, ebx7, _, _ := cpuid(7, 0)
	return ebx7&(1<<16) != 0
}

var poissonCDF32 = func() (c [12]uint32) {
	for j, v := range poissonCDF {
		c[j] = uint32(v)
	}
	return c
}()

// replicateSumsKernel is replicateSums with bootAVX512, 16 replicates per
// pass over the rows; an odd last replicate is the low half of the pair's
// draw, as in replicateSumsGo, and the unused lanes of the last group are
// dropped. With more than one core, the upper half of the groups runs on
// another goroutine (results do not depend on it).
func replicateSumsKernel(keys []uint64, wv, wdv, acc []float64, reps int) {
	if len(keys) == 0 {
		clear(acc[:2*reps])
		return
	}
	groups := (reps + bootGroup - 1) / bootGroup
	run := func(from, to int) {
		var steps [8]uint64
		var out [2 * bootGroup]float64
		for g := from; g < to; g++ {
			for j := range steps {
				steps[j] = uint64(g*bootGroup/2+j+1) * wyInc
			}
			bootAVX512(&keys[0], &wv[0], &wdv[0], len(keys), &steps, &poissonCDF32, &out)
			for q := range min(bootGroup, reps-g*bootGroup) {
				r := g*bootGroup + q
				acc[2*r], acc[2*r+1] = out[q], out[bootGroup+q]
			}
		}
	}
	if groups >= 8 && runtime.GOMAXPROCS(0) > 1 {
		mid := groups / 2
		var wg sync.WaitGroup
		wg.Add(1)
		go func() {
			defer wg.Done()
			run(mid, groups)
		}()
		run(0, mid)
		wg.Wait()
		return
	}
	run(0, groups)
}
