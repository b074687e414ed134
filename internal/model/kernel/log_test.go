package kernel

import (
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"slices"
	"strconv"
	"sync"
	"testing"
)

// maxLog32ULP bounds Log32's error against math.Log: |Log32(x) − ln x| ≤
// maxLog32ULP float32 ulps of ln x, with ln x = math.Log(float64(x)) (the
// reference; its own error, below a float64 ulp, is 2^−29 of a float32 ulp),
// and the ulp of a value v the spacing of float32 numbers in v's binade,
// 2^(⌊log2|v|⌋−23). Measured over every non-negative float32
// (TestLog32AllFloat32, AVX-512 path; the paths agree bit for bit): the
// largest error is 0.8265 ulp, at x = 1.413642 (bits 0x3fb4f239), so Log32 is
// faithfully rounded (always one of the two float32 values around ln x); it
// is the nearest one for 99.37% of the inputs.
const maxLog32ULP = 0.83

// ulp32 is the spacing of float32 numbers at |v| (v finite, nonzero).
func ulp32(v float64) float64 {
	_, e := math.Frexp(v) // |v| = f·2^e, f in [0.5, 1)
	return math.Ldexp(1, max(e-24, -149))
}

// logErr returns Log32's error at x in ulps of ln x and whether got is the
// float32 nearest to ln x; NaN when a special input got the wrong value.
func logErr(x, got float32) (ulps float64, rounded bool) {
	ref := math.Log(float64(x))
	switch {
	case math.IsNaN(ref):
		if got != got {
			return 0, true
		}
		return math.NaN(), false
	case math.IsInf(ref, 0) || ref == 0:
		if float64(got) == ref {
			return 0, true
		}
		return math.NaN(), false
	}
	return math.Abs(float64(got)-ref) / ulp32(ref), got == float32(ref)
}

// logStats accumulates logErr over many inputs.
type logStats struct {
	n, notRounded int
	worst         float64
	worstX        float32
	bad           []float32 // special inputs with a wrong result (first few)
}

func (s *logStats) add(x, got float32) {
	s.n++
	u, r := logErr(x, got)
	if u != u {
		if len(s.bad) < 5 {
			s.bad = append(s.bad, x)
		}
		return
	}
	if !r {
		s.notRounded++
	}
	if u > s.worst {
		s.worst, s.worstX = u, x
	}
}

func (s *logStats) merge(o *logStats) {
	s.n += o.n
	s.notRounded += o.notRounded
	if o.worst > s.worst {
		s.worst, s.worstX = o.worst, o.worstX
	}
	s.bad = append(s.bad, o.bad...)
}

func (s *logStats) check(t *testing.T, what string) {
	t.Helper()
	t.Logf("%s: %d inputs, largest error %.4f ulp (at x = %g, bits %#08x), %d (%.3g%%) not the nearest float32",
		what, s.n, s.worst, s.worstX, math.Float32bits(s.worstX), s.notRounded, 100*float64(s.notRounded)/float64(s.n))
	if len(s.bad) > 0 {
		t.Errorf("%s: wrong special values at x = %v", what, s.bad)
	}
	if s.worst > maxLog32ULP {
		t.Errorf("%s: error %.4f ulp at x = %g exceeds the bound %v ulp", what, s.worst, s.worstX, maxLog32ULP)
	}
}

// sweepLog runs Log32 on the active path over the float32 values whose bits
// are lo, lo+step, … below hi, split across GOMAXPROCS goroutines.
func sweepLog(lo, hi, step uint64) *logStats {
	workers := runtime.GOMAXPROCS(0)
	const chunk = 1 << 14
	parts := make([]logStats, workers)
	var wg sync.WaitGroup
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			x := make([]float32, chunk)
			got := make([]float32, chunk)
			s := &parts[w]
			for c := lo + uint64(w)*chunk*step; c < hi; c += uint64(workers) * chunk * step {
				n := 0
				for b := c; b < hi && n < chunk; b += step {
					x[n] = math.Float32frombits(uint32(b))
					n++
				}
				Log32(got[:n], x[:n])
				for i := range n {
					s.add(x[i], got[i])
				}
			}
		}()
	}
	wg.Wait()
	var s logStats
	for i := range parts {
		s.merge(&parts[i])
	}
	return &s
}

// TestLog32AllFloat32 checks Log32 on the active path against math.Log at
// every non-negative float32 (2^31 inputs, zero to +Inf and the NaNs), and
// every other vector path against the active one bit for bit at all 2^32
// bit patterns. It takes about a minute of CPU, so it runs only with
// MODELGATE_LOG32_ALL=1; TestLog32Sweep runs a dense part of it every time.
func TestLog32AllFloat32(t *testing.T) {
	if os.Getenv("MODELGATE_LOG32_ALL") == "" {
		t.Skip("set MODELGATE_LOG32_ALL=1 to check every float32 (about a minute of CPU)")
	}
	s := sweepLog(0, 1<<31, 1)
	s.check(t, fmt.Sprintf("%s, every non-negative float32", active.name))
	for _, be := range backends() {
		if be == active || be.logBlocks == nil {
			continue
		}
		const chunk = 1 << 16
		x := make([]float32, chunk)
		want, got := make([]float32, chunk), make([]float32, chunk)
		for c := uint64(0); c < 1<<32; c += chunk {
			for i := range x {
				x[i] = math.Float32frombits(uint32(c) + uint32(i))
			}
			Log32(want, x)
			saved := active
			active = be
			Log32(got, x)
			active = saved
			sameBitsOrNaN(t, be.name+" against "+active.name, x, want, got)
		}
		t.Logf("%s agrees with %s at all 2^32 bit patterns", be.name, active.name)
	}
}

// forPaths runs f with each path the CPU has as the active one.
func forPaths(t *testing.T, f func(t *testing.T, be *backend)) { run(t, f) }

// TestLog32Sweep checks Log32 against math.Log on every path over a dense,
// deterministic part of the float32 range: every value in [0.5, 2) (every
// mantissa on both sides of the √½ split), every 7th denormal, and every
// 257th bit pattern from zero to +Inf and beyond (the NaNs).
func TestLog32Sweep(t *testing.T) {
	forPaths(t, func(t *testing.T, be *backend) {
		if be.logBlocks == nil {
			t.Skip("the portable path is checked against the vector paths in TestLog32PathsAgree")
		}
		s := sweepLog(0x3f000000, 0x40000000, 1)
		s.merge(sweepLog(1, 0x00800000, 7))
		s.merge(sweepLog(0, 1<<31, 257))
		s.check(t, be.name+", sweep")
	})
}

// log32Edges are inputs at the edges of Log32's domain and of its range
// reduction.
var log32Edges = func() []float32 {
	bits := []uint32{
		0, 0x80000000, // ±0
		1, 2, 3, 0x007fffff, 0x00400000, // denormals
		0x00800000, 0x00800001, // smallest normals
		0x3f3504f2, 0x3f3504f3, 0x3f3504f4, // around √½
		0x3f7fffff, 0x3f800000, 0x3f800001, // around 1
		0x3fb504f3, 0x3fb4f239, // around √2, the worst input found
		0x7f7fffff, 0x7f800000, 0xff800000, // largest finite, ±Inf
		0x7fc00000, 0x7f800001, 0xffc00000, // NaNs
		0xbf800000, 0x80000001, 0xff7fffff, // negatives
	}
	out := make([]float32, len(bits))
	for i, b := range bits {
		out[i] = math.Float32frombits(b)
	}
	return out
}()

func TestLog32Edges(t *testing.T) {
	forPaths(t, func(t *testing.T, be *backend) {
		got := make([]float32, len(log32Edges))
		Log32(got, log32Edges)
		var s logStats
		for i, x := range log32Edges {
			s.add(x, got[i])
		}
		s.check(t, be.name+", edges")
		// The special values exactly, as math.Log defines them.
		for i, want := range []float32{float32(math.Inf(-1)), float32(math.Inf(-1))} {
			if got[i] != want {
				t.Errorf("Log32(%g) = %g, want %g", log32Edges[i], got[i], want)
			}
		}
		if got[13] != 0 {
			t.Errorf("Log32(1) = %g, want 0", got[13])
		}
	})
}

// TestLog32PathsAgree compares every path with the portable one bit for bit
// (NaNs as NaNs): on the edges, every 4099th bit pattern of all 2^32, and
// every 17th value of [0.5, 2).
func TestLog32PathsAgree(t *testing.T) {
	x := slices.Clone(log32Edges)
	for b := uint64(0); b < 1<<32; b += 4099 {
		x = append(x, math.Float32frombits(uint32(b)))
	}
	for b := uint64(0x3f000000); b < 0x40000000; b += 17 {
		x = append(x, math.Float32frombits(uint32(b)))
	}
	want := make([]float32, len(x))
	var s logStats
	for i, v := range x {
		want[i] = log32(v)
		s.add(v, want[i])
	}
	s.check(t, "generic")
	forPaths(t, func(t *testing.T, be *backend) {
		got := make([]float32, len(x))
		Log32(got, x)
		sameBitsOrNaN(t, "Log32", x, want, got)
		// In place, at every offset and length of a short slice (the tails
		// run through padded vectors).
		for lo := 0; lo < 20; lo++ {
			for hi := lo; hi < 60; hi++ {
				buf := slices.Clone(x[lo:hi])
				Log32(buf, buf)
				sameBitsOrNaN(t, fmt.Sprintf("Log32 in place [%d:%d]", lo, hi), x[lo:hi], want[lo:hi], buf)
			}
		}
	})
}

func sameBitsOrNaN(t *testing.T, what string, x, want, got []float32) {
	t.Helper()
	for i := range want {
		w, g := want[i], got[i]
		if (w != w && g != g) || math.Float32bits(w) == math.Float32bits(g) {
			continue
		}
		t.Fatalf("%s at x = %g (bits %#08x): got %g (%#08x), the portable path %g (%#08x)",
			what, x[i], math.Float32bits(x[i]), g, math.Float32bits(g), w, math.Float32bits(w))
	}
}

// TestFMA32 checks the fused multiply-add emulation on cases where rounding
// the float64 sum to float32 a second time would be wrong: a·b + c lands
// exactly halfway between two float32 values in float64 but not exactly.
func TestFMA32(t *testing.T) {
	cases := []struct{ a, b, c, want float32 }{
		// 2^−24(1+2^−18) · (1−2^−18) + (1+2^−23) = 1 + 3·2^−24 − 2^−60: just
		// below the halfway point between 1+2^−23 and 1+2^−22. Rounded to
		// float64 it is that halfway point, and float32 ties to even would
		// give 1+2^−22; the correct result is 1+2^−23.
		{0x1p-24 * (1 + 0x1p-18), 1 - 0x1p-18, 1 + 0x1p-23, 1 + 0x1p-23},
		// The same just above a halfway point whose even neighbour is below:
		// −(1 + 3·2^−24 − 2^−60) negated.
		{-0x1p-24 * (1 + 0x1p-18), 1 - 0x1p-18, -(1 + 0x1p-23), -(1 + 0x1p-23)},
		{1, 1, 0x1p-24, 1},       // exactly halfway: ties to even
		{3, 5, 1, 16},            // exact
		{0x1p-70, 0x1p-70, 1, 1}, // tiny product
		{-1, 1 + 0x1p-23, 1, -0x1p-23},
	}
	if naive := float32(math.FMA(float64(cases[0].a), float64(cases[0].b), float64(cases[0].c))); naive == cases[0].want {
		t.Fatalf("case 0 does not exercise double rounding: float64 FMA then float32 gives %g", naive)
	}
	for _, c := range cases {
		if got := fma32(c.a, c.b, c.c); got != c.want {
			t.Errorf("fma32(%g, %g, %g) = %g, want %g", c.a, c.b, c.c, got, c.want)
		}
	}
	// Against math.FMA: a·b + c rounded once in float64 and then to float32
	// differs from the exact result only near float32 halfway points, which
	// random inputs almost never hit; where it agrees, fma32 must too.
	rng := rand.New(rand.NewPCG(5, 6))
	for range 100000 {
		a, b, c := float32(rng.NormFloat64()), float32(rng.NormFloat64()), float32(rng.NormFloat64())
		want := float32(math.FMA(float64(a), float64(b), float64(c)))
		if got := fma32(a, b, c); got != want {
			t.Fatalf("fma32(%g, %g, %g) = %g, want %g", a, b, c, got, want)
		}
	}
}

// lossBatch returns n fixed-seed rows: p a sigmoid of a normal score (some
// rows exactly 0, 1, denormal or just inside the clipping bounds), y drawn
// from p, and, when soft is set, every 37th label fractional (so that some
// vectors of 8 or 16 rows hold a fractional label and some do not: the
// vector paths take one logarithm per row when all labels are 0 or 1).
func lossBatch(seed uint64, n int, soft bool) (p, y []float32) {
	rng := rand.New(rand.NewPCG(seed, 99))
	p, y = make([]float32, n), make([]float32, n)
	for i := range p {
		p[i] = float32(1 / (1 + math.Exp(-3*rng.NormFloat64())))
		switch rng.IntN(50) {
		case 0:
			p[i] = 0
		case 1:
			p[i] = 1
		case 2:
			p[i] = 1e-40
		case 3:
			p[i] = Eps32 * 1.5
		case 4:
			p[i] = 1 - 0x1p-23
		}
		if rng.Float64() < float64(p[i]) {
			y[i] = 1
		}
		if soft && i%37 == 0 {
			y[i] = float32(rng.Float64())
		}
	}
	return p, y
}

// TestLogLoss32PathsAgree: every path returns the same float64 as the
// portable one, bit for bit, for batches of every length up to 70 (the
// vector tails) and a few long ones.
func TestLogLoss32PathsAgree(t *testing.T) {
	lengths := []int{1000, 4097, 16384}
	for n := 1; n <= 70; n++ {
		lengths = append(lengths, n)
	}
	type batch struct{ p, y []float32 }
	var batches []batch
	for i, n := range lengths {
		p, y := lossBatch(uint64(i), n, i%2 == 0)
		batches = append(batches, batch{p, y})
	}
	want := make([]float64, len(batches))
	saved := active
	active = generic
	for i, b := range batches {
		want[i] = LogLoss32(b.p, b.y)
	}
	active = saved
	forPaths(t, func(t *testing.T, be *backend) {
		for i, b := range batches {
			if got := LogLoss32(b.p, b.y); math.Float64bits(got) != math.Float64bits(want[i]) {
				t.Fatalf("%d rows: %v, the portable path %v", len(b.p), got, want[i])
			}
			if math.IsNaN(want[i]) || math.IsInf(want[i], 0) || want[i] <= 0 {
				t.Fatalf("%d rows: loss %v", len(b.p), want[i])
			}
		}
		// A NaN prediction anywhere (in a vector or in the tail) gives NaN.
		p, y := lossBatch(7, 37, false)
		for _, at := range []int{0, 15, 16, 36} {
			q := slices.Clone(p)
			q[at] = float32(math.NaN())
			if got := LogLoss32(q, y); !math.IsNaN(got) {
				t.Errorf("NaN at row %d: loss %v", at, got)
			}
		}
		if got := LogLoss32(nil, nil); !math.IsNaN(got) {
			t.Errorf("empty batch: %v, want NaN", got)
		}
	})
}

// TestLogLoss32Clipping checks the clipping and the one-row values against
// math.Log: a row with p = 0 and y = 1 costs −ln(Eps32) = 24·ln 2, as does
// p = 1 with y = 0; p = ½ costs ln 2 whatever the label.
func TestLogLoss32Clipping(t *testing.T) {
	forPaths(t, func(t *testing.T, be *backend) {
		for _, c := range []struct {
			p, y float32
			want float64
		}{
			{0, 1, 24 * math.Ln2},
			{1, 0, 24 * math.Ln2},
			{-3, 1, 24 * math.Ln2},
			{0.5, 1, math.Ln2},
			{0.5, 0, math.Ln2},
			{0.5, 0.3, math.Ln2},
			{0.25, 0, -math.Log(0.75)},
		} {
			got := LogLoss32([]float32{c.p}, []float32{c.y})
			// One float32 term: the log's error (maxLog32ULP) plus the
			// rounding of the products, well inside 2^−22 relative.
			if math.Abs(got-c.want) > 0x1p-22*c.want {
				t.Errorf("LogLoss32(p=%g, y=%g) = %v, want %v", c.p, c.y, got, c.want)
			}
		}
	})
	defer func() {
		if recover() == nil {
			t.Error("LogLoss32 of 2 predictions and 1 label did not panic")
		}
	}()
	LogLoss32([]float32{0.5, 0.5}, []float32{1})
}

// numpyLossScript computes, with numpy 1.24, the log loss of the float32
// arrays p and y clipped to [Eps32, 1−Eps32] as LogLoss32 clips them:
// in float64 (the reference) and in float32 (what bench/logloss_numpy.py
// times).
const numpyLossScript = `
import sys, numpy as np
d, eps = sys.argv[1], np.float32(float.fromhex(sys.argv[2]))
p = np.fromfile(d + "/p", dtype="<f4"); y = np.fromfile(d + "/y", dtype="<f4")
q = np.clip(p, eps, np.float32(1) - eps)
q64, y64 = q.astype(np.float64), y.astype(np.float64)
l64 = -(y64*np.log(q64) + (1-y64)*np.log1p(-q64)).mean()
l32 = -(y*np.log(q) + (1-y)*np.log1p(-q)).mean()
print(repr(float(l64)), repr(float(l32)))
`

// TestLogLoss32AgainstNumpy compares LogLoss32 with numpy 1.24 (Debian's
// python3-numpy) on a fixed-seed batch of 100,003 rows (binary labels, then
// soft ones). Bound against numpy's float64 loss: each row's float32 term
// is off by at most maxLog32ULP ulps of its logarithm (under 2^−23 relative)
// plus, for log(1−q) with q < ½, 2^−24 relative error in 1−q (2^−23
// absolute in the log), plus a few roundings of 2^−24 relative for soft
// labels; so |got − want| ≤ 2^−21·(want + 1). Against numpy's own float32
// evaluation (log1p, pairwise float32 sum) the difference is larger;
// 1e−6 relative is our own allowance, stated, for that comparison.
func TestLogLoss32AgainstNumpy(t *testing.T) {
	requireModules(t, "numpy")
	for _, soft := range []bool{false, true} {
		p, y := lossBatch(2026, 100003, soft)
		dir := t.TempDir()
		writeLE(t, filepath.Join(dir, "p"), p)
		writeLE(t, filepath.Join(dir, "y"), y)
		out, err := exec.Command(debianPython, "-c", numpyLossScript, dir, strconv.FormatFloat(Eps32, 'x', -1, 64)).CombinedOutput()
		if err != nil {
			t.Fatalf("running numpy: %v\n%s", err, out)
		}
		var want64, want32 float64
		if _, err := fmt.Sscan(string(out), &want64, &want32); err != nil {
			t.Fatalf("numpy printed %q: %v", out, err)
		}
		forPaths(t, func(t *testing.T, be *backend) {
			got := LogLoss32(p, y)
			t.Logf("soft labels %v: LogLoss32 %.17g, numpy float64 %.17g (diff %.3g), numpy float32 %.9g (diff %.3g)",
				soft, got, want64, got-want64, want32, got-want32)
			if d := math.Abs(got - want64); d > 0x1p-21*(want64+1) {
				t.Errorf("soft labels %v: LogLoss32 %v, numpy float64 %v: off by %g", soft, got, want64, d)
			}
			if d := math.Abs(got - want32); d > 1e-6*want32 {
				t.Errorf("soft labels %v: LogLoss32 %v, numpy float32 %v: off by %g", soft, got, want32, d)
			}
		})
	}
}
