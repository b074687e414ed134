package stats

import (
	"math"
	"slices"
)

// Quantile returns the q-quantile of x by linear interpolation between
// order statistics (Hyndman and Fan's type 7, numpy's default "linear"
// method, computed as numpy 1.24 does): with h = (n−1)·q, i = floor(h) and
// g = h − i, the result is x₍ᵢ₎ + g·(x₍ᵢ₊₁₎ − x₍ᵢ₎) for g < ½ and
// x₍ᵢ₊₁₎ − (1−g)·(x₍ᵢ₊₁₎ − x₍ᵢ₎) otherwise. x need not be sorted and is not
// changed (Quantile sorts a copy). The result is NaN when x is empty,
// contains NaN, or q is not in [0, 1].
func Quantile(x []float64, q float64) float64 {
	if slices.ContainsFunc(x, math.IsNaN) {
		return math.NaN()
	}
	s := slices.Clone(x)
	sortFloats(s)
	return QuantileSorted(s, q)
}

// QuantileSorted is Quantile for x already sorted ascending (and free of
// NaN); it does not check the order.
func QuantileSorted(x []float64, q float64) float64 {
	n := len(x)
	if n == 0 || !(q >= 0 && q <= 1) {
		return math.NaN()
	}
	h := float64(n-1) * q
	i := math.Floor(h)
	g := h - i
	lo := int(i)
	hi := min(lo+1, n-1)
	a, b := x[lo], x[hi]
	diff := b - a
	if g >= 0.5 {
		return b - diff*(1-g)
	}
	return a + diff*g
}

func sortFloats(x []float64) { slices.Sort(x) }
