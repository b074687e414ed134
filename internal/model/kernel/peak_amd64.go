//go:build amd64 && !purego

package kernel

// fmaPeakAVX512 runs n rounds of 24 independent 16-lane fused multiply-adds
// on registers alone (768 float32 FLOP a round): nothing waits on memory or
// on another instruction's result, so it runs at the core's FMA throughput.
// The benchmarks measure the machine's peak with it.
func fmaPeakAVX512(n int)

// fmaPeakAVX2 is fmaPeakAVX512 for AVX2+FMA: 12 independent 8-lane fused
// multiply-adds a round (192 float32 FLOP).
func fmaPeakAVX2(n int)

// fmaPeak returns the active path's peak loop and its FLOP per round, or
// nil when the active path has none (the portable path).
func fmaPeak() (func(n int), float64) {
	switch active {
	case avx512:
		return fmaPeakAVX512, 24 * 16 * 2
	case avx2:
		return fmaPeakAVX2, 12 * 8 * 2
	}
	return nil, 0
}
