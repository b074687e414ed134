package fit

import (
	"math"
	"slices"
)

// Quantiles returns the q-quantiles of x for each q in qs (each in [0,1]),
// by linear interpolation between order statistics: Hyndman & Fan's
// definition 7, numpy's default ("linear"). x is not modified. With x empty
// every result is NaN; a q outside [0,1] or NaN gives NaN.
func Quantiles(x []float64, qs []float64) []float64 {
	out := make([]float64, len(qs))
	s := slices.Clone(x)
	slices.Sort(s)
	for i, q := range qs {
		if len(s) == 0 || !(q >= 0 && q <= 1) {
			out[i] = math.NaN()
			continue
		}
		h := float64(len(s)-1) * q
		lo := int(math.Floor(h))
		if lo >= len(s)-1 {
			out[i] = s[len(s)-1]
			continue
		}
		out[i] = s[lo] + (h-float64(lo))*(s[lo+1]-s[lo])
	}
	return out
}
