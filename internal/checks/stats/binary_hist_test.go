package stats

import (
	"math"
	"testing"
)

// refHist is the AUC histogram as the straightforward per-row loop builds
// it: each row adds w·y to its bin's positive sum and w − w·y to its
// negative sum, in row order.
func refHist(p, y, w []float32) []float64 {
	h := make([]float64, 2*AUCBins)
	for i := range p {
		pf, yf, wf := float64(p[i]), float64(y[i]), float64(w[i])
		wy := wf * yf
		b := 2 * min(int(pf*AUCBins), AUCBins-1)
		h[b] += wy
		h[b+1] += wf - wy
	}
	return h
}

func sameBits(t *testing.T, what string, got, want []float64) {
	t.Helper()
	for i := range want {
		if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
			t.Fatalf("%s: bin %d (%s): %v, want %v bit for bit", what, i/2, []string{"positive", "negative"}[i%2], got[i], want[i])
		}
	}
}

// TestBinaryHistogramBitForBit: the histogram Binary builds (with labels 0
// and 1, the additions gathered into a loop of their own) is the
// straightforward loop's, bit for bit: zero weights, labels -0, weights
// that do not add up exactly, many rows in few bins, batches across the
// chunk size; soft labels too.
func TestBinaryHistogramBitForBit(t *testing.T) {
	rng := newTestRand(31)
	const n = 5000
	p, y, soft, w := make([]float32, n), make([]float32, n), make([]float32, n), make([]float32, n)
	for i := range n {
		p[i] = float32(rng.Float64())
		if i%3 == 0 {
			p[i] = 0.1 + float32(rng.Intn(4))/float32(AUCBins) // crowded bins
		}
		if rng.Float64() < 0.3 {
			y[i] = 1
		} else if i%7 == 0 {
			y[i] = float32(math.Copysign(0, -1))
		}
		soft[i] = float32(rng.Float64())
		w[i] = float32(rng.Float64() * 3)
		if i%11 == 0 {
			w[i] = 0
		}
	}
	for _, batch := range []int{1, 777, chunk, chunk + 1, n} {
		b, s := NewBinary(), NewBinary()
		for lo := 0; lo < n; lo += batch {
			hi := min(lo+batch, n)
			if err := b.AddBatch(p[lo:hi], y[lo:hi], w[lo:hi]); err != nil {
				t.Fatal(err)
			}
			if err := s.AddBatch(p[lo:hi], soft[lo:hi], w[lo:hi]); err != nil {
				t.Fatal(err)
			}
		}
		sameBits(t, "labels 0 and 1", b.hist, refHist(p, y, w))
		sameBits(t, "soft labels", s.hist, refHist(p, soft, w))
	}
}

// TestBinaryHistogramShardsBitForBit: with weights whose sums are exact
// (multiples of 1/4, as unit weights and the anomalous rows' weight of a
// quarter give), shards merged give the one pass's histogram and totals
// bit for bit, whatever the cut.
func TestBinaryHistogramShardsBitForBit(t *testing.T) {
	rng := newTestRand(32)
	const n = 9001
	p, y, w := make([]float32, n), make([]float32, n), make([]float32, n)
	for i := range n {
		p[i] = float32(rng.Float64())
		if rng.Float64() < 0.2 {
			y[i] = 1
		}
		w[i] = float32(rng.Intn(8)) / 4
	}
	one := NewBinary()
	if err := one.AddBatch(p, y, w); err != nil {
		t.Fatal(err)
	}
	merged := NewBinary()
	cuts := []int{0, 1, 1000, 4097, 4098, n}
	for k := range len(cuts) - 1 {
		s := NewBinary()
		if err := s.AddBatch(p[cuts[k]:cuts[k+1]], y[cuts[k]:cuts[k+1]], w[cuts[k]:cuts[k+1]]); err != nil {
			t.Fatal(err)
		}
		merged.Merge(s)
	}
	sameBits(t, "merged shards", merged.hist, one.hist)
	auc1, b1 := one.AUC()
	auc2, b2 := merged.AUC()
	if math.Float64bits(auc1) != math.Float64bits(auc2) || math.Float64bits(b1) != math.Float64bits(b2) {
		t.Errorf("AUC %v ± %v merged, %v ± %v in one pass", auc2, b2, auc1, b1)
	}
	if one.WeightSum() != merged.WeightSum() || one.Rows() != merged.Rows() {
		t.Errorf("weight %v / %v, rows %d / %d", merged.WeightSum(), one.WeightSum(), merged.Rows(), one.Rows())
	}
}
