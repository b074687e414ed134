package kernel

import (
	"fmt"
	"math"
)

// The float32 natural logarithm of Log32 and LogLoss32 is Cephes logf
// (Stephen L. Moshier, Cephes Math Library, single precision, logf.c, 1984,
// 1995), computed in vectors:
//
//  1. denormal x are scaled by 2^23 (exact) and the exponent lowered by 23;
//  2. x = m·2^e with m in [0.5, 1) read from the bits; if m < √½ then
//     e = e−1 and t = 2m−1, else t = m−1 (both exact), so t in [√½−1, √2−1);
//  3. log(1+t) = t − t²/2 + t·t²·P(t), P of degree 8 with Moshier's
//     coefficients below, evaluated by Horner's rule in fused multiply-adds;
//  4. log x = e·ln2 + log(1+t), ln2 split as 0.693359375 (exact in a few
//     bits) − 2.12194440e−4, each part added with one fused multiply-add.
//
// Special inputs: log(±0) = −Inf, log(+Inf) = +Inf, log of a negative number
// or NaN is NaN. The measured error against math.Log is in log_test.go
// (maxLog32ULP). Every path (AVX-512, AVX2+FMA, portable Go) runs the same
// operations in the same order with one rounding each (the Go path emulates
// the fused multiply-add exactly, see fma32), so they agree bit for bit.
const (
	logP0 = 7.0376836292e-2
	logP1 = -1.1514610310e-1
	logP2 = 1.1676998740e-1
	logP3 = -1.2420140846e-1
	logP4 = 1.4249322787e-1
	logP5 = -1.6668057665e-1
	logP6 = 2.0000714765e-1
	logP7 = -2.4999993993e-1
	logP8 = 3.3333331174e-1
	logQ1 = -2.12194440e-4 // ln2 − 0.693359375, rounded
	logQ2 = 0.693359375    // 355/512
	// sqrtHalf is √½ rounded to float32, the split point of step 2.
	sqrtHalf = 0.707106781186547524
)

// Eps32 is LogLoss32's clipping bound: p is limited to [Eps32, 1−Eps32]
// before its logarithms are taken. Our own choice: 2^−24 is the smallest
// bound for which 1−Eps32 is a float32 below 1, and a float32 probability
// can come no closer to 1 than that, so clipping the lower end at the same
// distance makes the loss symmetric under swapping the classes (p → 1−p,
// y → 1−y). A confidently wrong row costs at most −log(2^−24) ≈ 16.64 nats.
// (The gate's statistics clip at 1e−15 in float64; see package stats.)
const Eps32 = 0x1p-24

var nan32 = math.Float32frombits(0x7fc00000)

// Log32 sets dst[i] to the natural logarithm of x[i] for every i < len(x)
// (see the comment above Eps32 for the method and its error). dst may be x
// itself; it must be at least as long as x.
func Log32(dst, x []float32) {
	if len(dst) < len(x) {
		panic(fmt.Sprintf("kernel: Log32 into %d elements from %d", len(dst), len(x)))
	}
	n := len(x)
	if active.logBlocks == nil {
		for i, v := range x {
			dst[i] = log32(v)
		}
		return
	}
	nb := n &^ 15
	if nb > 0 {
		active.logBlocks(&dst[0], &x[0], nb)
	}
	if r := n - nb; r > 0 {
		// The last few elements run through the same vector code, padded
		// with ones.
		var buf [16]float32
		for i := range buf {
			buf[i] = 1
		}
		copy(buf[:], x[nb:])
		active.logBlocks(&buf[0], &buf[0], 16)
		copy(dst[nb:n], buf[:r])
	}
}

// LogLoss32 returns the mean log loss of the predictions p of the labels y,
//
//	−(1/n) Σ (y[i]·log(q[i]) + (1−y[i])·log(1−q[i])),  q[i] = min(max(p[i], Eps32), 1−Eps32),
//
// with the logarithms of Log32 and each row's term computed in float32
// (1−q and 1−y rounded once, y·log(q) added to (1−y)·log(1−q) in one fused
// multiply-add), then summed in float64: row i is added to partial sum
// i mod 16 in index order and the 16 partial sums are added in order, so the
// result is the same on every path and for every CPU. y may be fractional
// (a soft label); the vector paths take one logarithm per row for a vector
// of rows whose labels are all 0 or 1, which gives the same bits (the term
// is then exactly log q or log(1−q)). A NaN p gives NaN; n = 0 gives NaN (the mean of nothing).
// It panics if p and y differ in length.
//
// It is a runtime facility, benchmarked against numpy: the gate's reported
// log loss is computed in float64 by package stats and does not use it.
func LogLoss32(p, y []float32) float64 {
	if len(p) != len(y) {
		panic(fmt.Sprintf("kernel: LogLoss32 of %d predictions and %d labels", len(p), len(y)))
	}
	n := len(p)
	if n == 0 {
		return math.NaN()
	}
	var acc [16]float64
	if active.lossBlocks == nil {
		for i := range p {
			acc[i%16] += float64(lossTerm32(p[i], y[i]))
		}
	} else {
		nb := n &^ 15
		if nb > 0 {
			active.lossBlocks(&p[0], &y[0], nb, &acc)
		}
		if r := n - nb; r > 0 {
			// nb is a multiple of 16, so row nb+k belongs to partial sum k;
			// the padding rows' terms are dropped.
			var pb, yb [16]float32
			copy(pb[:], p[nb:])
			copy(yb[:], y[nb:])
			var tail [16]float64
			active.lossBlocks(&pb[0], &yb[0], 16, &tail)
			for k := 0; k < r; k++ {
				acc[k] += tail[k]
			}
		}
	}
	var s float64
	for _, v := range acc {
		s += v
	}
	return -s / float64(n)
}

// lossTerm32 is one row's y·log(q) + (1−y)·log(1−q) (the negated loss) as
// the vector paths compute it.
func lossTerm32(p, y float32) float32 {
	// Comparisons in this order keep NaN (as VMAXPS(eps, p) and
	// VMINPS(1−eps, q) do with p, q as the second source).
	if p < Eps32 {
		p = Eps32
	}
	if p > 1-Eps32 {
		p = 1 - Eps32
	}
	a := log32(p)
	b := log32(1 - p)
	l := float32((1 - y) * b)
	return fma32(y, a, l)
}

// log32 is the portable Log32 of one element: the vector paths' operations
// one by one, each rounded to float32 (explicit conversions keep the
// compiler from fusing a multiply and an add).
func log32(x float32) float32 {
	switch {
	case !(x >= 0): // negative or NaN
		return nan32
	case x == 0:
		return float32(math.Inf(-1))
	case x > math.MaxFloat32:
		return x
	}
	var e float32
	if x < 0x1p-126 { // denormal: scale into the normal range (exact)
		x = float32(x * 0x1p23)
		e = -23
	}
	bits := math.Float32bits(x)
	e = e + float32(int32(bits>>23)-126)
	m := math.Float32frombits(bits&0x007fffff | 0x3f000000) // [0.5, 1)
	if m < sqrtHalf {
		e = e - 1
		m = m + m
	}
	t := m - 1
	z := float32(t * t)
	y := fma32(logP0, t, logP1)
	y = fma32(y, t, logP2)
	y = fma32(y, t, logP3)
	y = fma32(y, t, logP4)
	y = fma32(y, t, logP5)
	y = fma32(y, t, logP6)
	y = fma32(y, t, logP7)
	y = fma32(y, t, logP8)
	y = float32(y * t)
	y = float32(y * z)
	y = fma32(e, logQ1, y)
	y = fma32(z, -0.5, y)
	r := t + y
	return fma32(e, logQ2, r)
}

// fma32 returns a·b + c rounded once to float32, as VFMADD…PS computes it.
// The product is exact in float64 (24 + 24 bits); the sum is rounded to odd
// in float64 (round to nearest, then, if inexact and the last bit is even,
// step toward the exact value, which TwoSum gives), and rounding that to
// float32 is then the correctly rounded result because float64 carries at
// least two more bits than float32 (S. Boldo and G. Melquiond, "Emulation
// of FMA and correctly rounded sums: proved algorithms using rounding to
// odd", IEEE Transactions on Computers 57(4), 2008).
func fma32(a, b, c float32) float32 {
	p := float64(float64(a) * float64(b))
	cc := float64(c)
	s := p + cc
	// TwoSum (Knuth, TAOCP vol. 2, 4.2.2): err = (p + cc) − s exactly.
	bv := s - p
	err := (p - (s - bv)) + (cc - bv)
	if err != 0 && !math.IsInf(s, 0) && math.Float64bits(s)&1 == 0 {
		if err > 0 {
			s = math.Nextafter(s, math.Inf(1))
		} else if err < 0 {
			s = math.Nextafter(s, math.Inf(-1))
		}
	}
	return float32(s)
}
