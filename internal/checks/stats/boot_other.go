//go:build !amd64 || purego

package stats

// haveBootKernel is false: replicateSums runs replicateSumsGo.
var haveBootKernel = false

func replicateSumsKernel(keys []uint64, wv, wdv, acc []float64, reps int) {
	replicateSumsGo(keys, wv, wdv, acc, reps)
}
