package stats

import (
	"math"
	"testing"
)

// FuzzBinaryMerge: any split of valid rows into two accumulators, merged,
// agrees with one accumulator; metrics stay in their ranges; an invalid
// row is refused and leaves the accumulator unchanged.
func FuzzBinaryMerge(f *testing.F) {
	f.Add([]byte{0, 0, 255, 255, 1, 16, 128, 0, 0, 32}, uint8(1), uint8(0))
	f.Add([]byte{10, 20, 30, 40, 50, 60, 70, 80, 90, 100, 110, 120, 130, 140, 150}, uint8(2), uint8(3))
	f.Add([]byte{255, 255, 0, 16, 0, 0, 1, 16, 77, 77, 0, 0}, uint8(0), uint8(1))
	f.Fuzz(func(t *testing.T, data []byte, split, bad uint8) {
		// Four bytes a row: p (16 bits), y, w.
		n := len(data) / 4
		p, y, w := make([]float32, n), make([]float32, n), make([]float32, n)
		for i := range n {
			b := data[4*i : 4*i+4]
			p[i] = float32(uint16(b[0])<<8|uint16(b[1])) / 65535
			y[i] = float32(b[2] & 1)
			if b[2]&2 != 0 {
				y[i] = float32(b[2]) / 255 // soft label
			}
			w[i] = float32(b[3]) / 16
		}
		cut := 0
		if n > 0 {
			cut = int(split) % (n + 1)
		}
		one, left, right := NewBinary(), NewBinary(), NewBinary()
		for _, c := range []struct {
			b          *Binary
			lo, hi     int
			p1, y1, w1 []float32
		}{{one, 0, n, p, y, w}, {left, 0, cut, p, y, w}, {right, cut, n, p, y, w}} {
			if err := c.b.AddBatch(c.p1[c.lo:c.hi], c.y1[c.lo:c.hi], c.w1[c.lo:c.hi]); err != nil {
				t.Fatalf("valid rows refused: %v", err)
			}
		}
		left.Merge(right)
		if left.Rows() != one.Rows() {
			t.Fatalf("rows %d vs %d", left.Rows(), one.Rows())
		}
		if one.WeightSum() == 0 {
			return
		}
		same := func(what string, a, b float64) {
			if !(math.Abs(a-b) <= 1e-12*math.Abs(a)+1e-15) && !(math.IsNaN(a) && math.IsNaN(b)) {
				t.Errorf("%s: one pass %v, merged %v", what, a, b)
			}
		}
		auc1, bound1 := one.AUC()
		auc2, _ := left.AUC()
		same("log loss", one.LogLoss(), left.LogLoss())
		same("ECE", one.ECE(), left.ECE())
		same("MCE", one.MCE(), left.MCE())
		same("AUC", auc1, auc2)
		// The worst row costs -log(1 - (1-Eps)): 1-Eps rounds in float64.
		eps := float64(Eps) // a variable: constant arithmetic would be exact
		maxLoss := -math.Log(1 - (1 - eps))
		if ll := one.LogLoss(); !(ll >= 0 && ll <= maxLoss*(1+1e-15)) {
			t.Errorf("log loss %v outside [0, %v]", ll, maxLoss)
		}
		if e, m := one.ECE(), one.MCE(); !(e >= 0 && e <= m+1e-15 && m <= 1) {
			t.Errorf("ECE %v, MCE %v", e, m)
		}
		if !math.IsNaN(auc1) {
			exact, err := ExactAUC(p, y, w)
			if err != nil {
				t.Fatal(err)
			}
			if !(auc1 >= 0 && auc1 <= 1) || math.Abs(auc1-exact) > bound1+1e-12 {
				t.Errorf("histogram AUC %v, exact %v, bound %v", auc1, exact, bound1)
			}
		}

		// One bad value in an otherwise valid batch: refused, no change.
		if n > 0 {
			i := int(bad) % n
			pb := append([]float32(nil), p...)
			pb[i] = []float32{float32(math.NaN()), -0.5, 1.5}[int(bad)%3]
			before := one.LogLoss()
			if err := one.AddBatch(pb, y, w); err == nil {
				t.Fatalf("p %v accepted", pb[i])
			}
			if one.Rows() != int64(n) || one.LogLoss() != before {
				t.Fatal("a refused batch changed the accumulator")
			}
		}
	})
}

// FuzzPairedMerge: with weights that are multiples of 1/16 and
// differences multiples of 1/64, every replicate sum is exact, so any
// split of the rows, in any order, merged, must give bit-identical
// replicate sums and weighted mean.
func FuzzPairedMerge(f *testing.F) {
	f.Add([]byte{1, 200, 16, 2, 100, 32, 3, 0, 0, 4, 255, 255}, uint8(2), false)
	f.Add([]byte{9, 128, 16, 9, 130, 16, 250, 1, 8}, uint8(1), true)
	f.Fuzz(func(t *testing.T, data []byte, split uint8, reverse bool) {
		n := len(data) / 3
		ids, d, w := make([]int64, n), make([]float64, n), make([]float32, n)
		for i := range n {
			b := data[3*i : 3*i+3]
			ids[i] = int64(b[0])<<32 | int64(i) // distinct ids
			d[i] = (float64(b[1]) - 128) / 64
			w[i] = float32(b[2]) / 16
		}
		const reps = 9
		one, left, right := mustPaired(t, 3, reps), mustPaired(t, 3, reps), mustPaired(t, 3, reps)
		if err := one.AddBatch(ids, d, w); err != nil {
			t.Fatal(err)
		}
		cut := 0
		if n > 0 {
			cut = int(split) % (n + 1)
		}
		if err := left.AddBatch(ids[:cut], d[:cut], w[:cut]); err != nil {
			t.Fatal(err)
		}
		for j := n - 1; j >= cut; j-- {
			i := j
			if !reverse {
				i = cut + n - 1 - j
			}
			if err := right.Add(ids[i], d[i], w[i]); err != nil {
				t.Fatal(err)
			}
		}
		if err := left.Merge(right); err != nil {
			t.Fatal(err)
		}
		if left.Rows() != one.Rows() || left.WeightSum() != one.WeightSum() {
			t.Fatalf("rows %d/%d weight %v/%v", left.Rows(), one.Rows(), left.WeightSum(), one.WeightSum())
		}
		if m1, m2 := one.Mean(), left.Mean(); m1 != m2 && !(math.IsNaN(m1) && math.IsNaN(m2)) {
			t.Errorf("mean %v vs %v", m1, m2)
		}
		for r := range reps {
			a1, b1 := one.ReplicateSums(r)
			a2, b2 := left.ReplicateSums(r)
			if a1 != a2 || b1 != b2 {
				t.Errorf("replicate %d: (%v, %v) vs (%v, %v)", r, a1, b1, a2, a2)
			}
		}
		if s1, s2 := one.StdErr(), left.StdErr(); !(math.Abs(s1-s2) <= 1e-12*s1) && !(math.IsNaN(s1) && math.IsNaN(s2)) {
			t.Errorf("std err %v vs %v", s1, s2)
		}
	})
}
