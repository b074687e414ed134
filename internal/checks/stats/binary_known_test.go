package stats

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestAddBatchWithLossMatches: adding rows with the losses AddBatchLoss
// computed gives bit-identical sums to AddBatch.
func TestAddBatchWithLossMatches(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	n := 5000
	p, y, w := make([]float32, n), make([]float32, n), make([]float32, n)
	for i := range p {
		p[i] = r.Float32()
		if r.Float64() < 0.2 {
			y[i] = 1
		}
		w[i] = float32(r.IntN(3))
	}
	loss := make([]float64, n)
	a, b, c := NewBinary(), NewBinary(), NewBinary()
	if err := a.AddBatchLoss(p, y, w, loss); err != nil {
		t.Fatal(err)
	}
	if err := b.AddBatchWithLoss(p, y, w, loss); err != nil {
		t.Fatal(err)
	}
	if err := c.AddBatch(p, y, w); err != nil {
		t.Fatal(err)
	}
	for _, x := range []*Binary{b, c} {
		if math.Float64bits(x.LogLoss()) != math.Float64bits(a.LogLoss()) || x.ECE() != a.ECE() || x.WeightSum() != a.WeightSum() {
			t.Errorf("sums differ: %v %v vs %v", x.LogLoss(), x.ECE(), a.LogLoss())
		}
		au, _ := a.AUC()
		xu, _ := x.AUC()
		if au != xu {
			t.Errorf("AUC %v vs %v", xu, au)
		}
	}
	if err := b.AddBatchWithLoss(p, y, w, loss[:1]); err == nil {
		t.Error("a short loss buffer was accepted")
	}
}
