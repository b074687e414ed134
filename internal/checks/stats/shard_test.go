package stats

import (
	"math"
	"testing"
)

// scoredRows is a synthetic holdout scored by a baseline and a candidate.
type scoredRows struct {
	ids          []int64
	base, cand   []float32
	y, w         []float32
	lossB, lossC []float64
}

func makeScored(seed int64, n int) scoredRows {
	rng := newTestRand(seed)
	r := scoredRows{ids: make([]int64, n), base: make([]float32, n), cand: make([]float32, n),
		y: make([]float32, n), w: make([]float32, n)}
	for i := range n {
		r.ids[i] = int64(1000 + 3*i)
		logit := rng.NormFloat64() * 1.5
		pTrue := 1 / (1 + math.Exp(-logit))
		if rng.Float64() < pTrue {
			r.y[i] = 1
		}
		r.base[i] = float32(1 / (1 + math.Exp(-(logit + rng.NormFloat64()*0.8))))
		r.cand[i] = float32(1 / (1 + math.Exp(-(logit + rng.NormFloat64()*0.7))))
		r.w[i] = float32(0.25 + 1.5*rng.Float64())
	}
	r.lossB, r.lossC = make([]float64, n), make([]float64, n)
	for i := range n {
		r.lossB[i] = LogLoss(float64(r.base[i]), float64(r.y[i]))
		r.lossC[i] = LogLoss(float64(r.cand[i]), float64(r.y[i]))
	}
	return r
}

func (r scoredRows) diffs(lo, hi int) []float64 {
	d := make([]float64, hi-lo)
	for i := range d {
		d[i] = r.lossC[lo+i] - r.lossB[lo+i]
	}
	return d
}

// feed adds rows [lo, hi) to b and a in batches of the given size.
func feed(t *testing.T, r scoredRows, lo, hi, batch int, unit bool, b *Binary, a *Paired) {
	t.Helper()
	for s := lo; s < hi; s += batch {
		e := min(s+batch, hi)
		w := r.w[s:e]
		if unit {
			w = nil
		}
		if err := b.AddBatch(r.cand[s:e], r.y[s:e], w); err != nil {
			t.Fatal(err)
		}
		if err := a.AddBatch(r.ids[s:e], r.diffs(s, e), w); err != nil {
			t.Fatal(err)
		}
	}
}

func TestShardMergeEqualsOnePass(t *testing.T) {
	const n, reps = 10007, 64
	r := makeScored(11, n)
	for _, unit := range []bool{true, false} {
		name := "weighted"
		if unit {
			name = "unit weights"
		}
		t.Run(name, func(t *testing.T) {
			one, onePaired := NewBinary(), mustPaired(t, 5, reps)
			feed(t, r, 0, n, 777, unit, one, onePaired)

			// Four uneven shards, each with its own batch size, merged.
			cuts := []int{0, 1200, 5003, 5004, n}
			merged, mergedPaired := NewBinary(), mustPaired(t, 5, reps)
			for s := range 4 {
				b, a := NewBinary(), mustPaired(t, 5, reps)
				feed(t, r, cuts[s], cuts[s+1], []int{100, 4096, 1, 333}[s], unit, b, a)
				merged.Merge(b)
				if err := mergedPaired.Merge(a); err != nil {
					t.Fatal(err)
				}
			}
			compareBinary(t, one, merged)
			comparePaired(t, onePaired, mergedPaired, unit)
		})
	}
}

func TestBootstrapDrawsIgnoreRowOrder(t *testing.T) {
	// The draws depend on (seed, row id, replicate) only: rows added in
	// reverse order give the same replicate weight sums, bit for bit with
	// unit weights (small integers).
	const n, reps = 3000, 33 // odd: the last replicate uses half a draw
	r := makeScored(12, n)
	fwd, rev := mustPaired(t, 8, reps), mustPaired(t, 8, reps)
	d := r.diffs(0, n)
	if err := fwd.AddBatch(r.ids, d, nil); err != nil {
		t.Fatal(err)
	}
	for i := n - 1; i >= 0; i-- {
		if err := rev.Add(r.ids[i], d[i], 1); err != nil {
			t.Fatal(err)
		}
	}
	comparePaired(t, fwd, rev, true)
	// And a different seed draws differently.
	other := mustPaired(t, 9, reps)
	_ = other.AddBatch(r.ids, d, nil)
	same := 0
	for k := range reps {
		a, _ := fwd.ReplicateSums(k)
		b, _ := other.ReplicateSums(k)
		if a == b {
			same++
		}
	}
	if same > reps/4 {
		t.Errorf("%d of %d replicate sums equal under another seed", same, reps)
	}
}

// tDistTol is the relative accuracy of gonum's Student's t CDF and
// quantile at df degrees of freedom, from a comparison with mpmath 1.2.1 at
// 40 digits over df 7 to 1e6 and |x| up to 8 (largest errors seen:
// 3.9e-13 at df 1e3, 2.2e-12 at 1e4, 8.4e-11 at 1e5, 2.4e-10 at 1e6).
func tDistTol(df float64) float64 { return rel + 2e-16*df*math.Log(max(df, 1)) }

func mustPaired(t *testing.T, seed uint64, reps int) *Paired {
	t.Helper()
	a, err := NewPaired(seed, reps)
	if err != nil {
		t.Fatal(err)
	}
	return a
}

func compareBinary(t *testing.T, a, b *Binary) {
	t.Helper()
	if a.Rows() != b.Rows() {
		t.Errorf("rows %d vs %d", a.Rows(), b.Rows())
	}
	aucA, boundA := a.AUC()
	aucB, boundB := b.AUC()
	for _, c := range []struct {
		name string
		x, y float64
	}{
		{"weight", a.WeightSum(), b.WeightSum()},
		{"log loss", a.LogLoss(), b.LogLoss()},
		{"NE", a.NormalizedEntropy(), b.NormalizedEntropy()},
		{"AUC", aucA, aucB},
		{"AUC bound", boundA, boundB},
		{"ECE", a.ECE(), b.ECE()},
		{"MCE", a.MCE(), b.MCE()},
		{"predicted/observed", a.PredictedObserved(), b.PredictedObserved()},
	} {
		near(t, c.name, c.y, c.x, rel)
	}
	ca, cb := a.Calibration(), b.Calibration()
	for k := range ca {
		near(t, "bin count", cb[k].Count, ca[k].Count, rel)
		near(t, "bin predicted", cb[k].Predicted, ca[k].Predicted, rel)
		near(t, "bin observed", cb[k].Observed, ca[k].Observed, rel)
	}
}

func comparePaired(t *testing.T, a, b *Paired, unit bool) {
	t.Helper()
	if a.Rows() != b.Rows() {
		t.Errorf("rows %d vs %d", a.Rows(), b.Rows())
	}
	for k := range a.Replicates() {
		wa, da := a.ReplicateSums(k)
		wb, db := b.ReplicateSums(k)
		if unit && wa != wb {
			t.Errorf("replicate %d: Σw·k %v vs %v: the draws differ", k, wa, wb)
		}
		near(t, "replicate Σw·k", wb, wa, rel)
		near(t, "replicate Σw·k·d", db, da, rel)
	}
	ra, err := a.NonInferiority(0.002, 0.95)
	if err != nil {
		t.Fatal(err)
	}
	rb, err := b.NonInferiority(0.002, 0.95)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name string
		x, y float64
	}{
		{"mean", ra.MeanDiff, rb.MeanDiff}, {"se", ra.StdErr, rb.StdErr}, {"t", ra.T, rb.T},
		{"df", ra.DF, rb.DF},
		{"bootstrap lower", ra.BootstrapLower, rb.BootstrapLower},
		{"bootstrap upper", ra.BootstrapUpper, rb.BootstrapUpper},
	} {
		near(t, c.name, c.y, c.x, rel)
	}
	// p and the bound go through gonum's t distribution, whose error at
	// large df is not smooth in df (see tQuantile): a last-bit change of
	// the weighted df moves them by up to twice tDistTol.
	near(t, "p", rb.P, ra.P, 2*tDistTol(ra.DF))
	near(t, "upper", rb.Upper, ra.Upper, 2*tDistTol(ra.DF))
	if ra.Pass != rb.Pass || ra.BootstrapReplicas != rb.BootstrapReplicas || ra.N != rb.N {
		t.Errorf("one pass %+v, shards %+v", ra, rb)
	}
}

func TestReconAndHistogramShards(t *testing.T) {
	rng := newTestRand(21)
	const rows, width = 500, 40
	q, tg := make([]float32, rows*width), make([]float32, rows*width)
	for i := range q {
		q[i] = float32(rng.Float64())
		if rng.Float64() < 0.1 {
			tg[i] = float32(rng.Intn(4)) / 3
		}
	}
	weight := func(nz int) float64 { return 1 / (1 + float64(nz)) }
	one, _ := NewRecon(0.6, weight)
	loss := make([]float64, rows)
	if err := one.AddBatch(q, tg, width, loss); err != nil {
		t.Fatal(err)
	}
	merged, _ := NewRecon(0.6, weight)
	for _, c := range [][2]int{{0, 77}, {77, 300}, {300, rows}} {
		s, _ := NewRecon(0.6, weight)
		if err := s.AddBatch(q[c[0]*width:c[1]*width], tg[c[0]*width:c[1]*width], width, nil); err != nil {
			t.Fatal(err)
		}
		_ = merged.Merge(s)
	}
	near(t, "BCEAll", merged.BCEAll(), one.BCEAll(), rel)
	near(t, "BCENonzero", merged.BCENonzero(), one.BCENonzero(), rel)
	near(t, "Reconstruction", merged.Reconstruction(), one.Reconstruction(), rel)
	other, _ := NewRecon(0.5, weight)
	if err := merged.Merge(other); err == nil {
		t.Error("merged different alphas")
	}

	h1, _ := NewHistogram(-0.5, 0.5, 50)
	_ = h1.AddBatch(loss, nil)
	h2, _ := NewHistogram(-0.5, 0.5, 50)
	for _, c := range [][2]int{{0, 10}, {10, rows}} {
		s, _ := NewHistogram(-0.5, 0.5, 50)
		_ = s.AddBatch(loss[c[0]:c[1]], nil)
		_ = h2.Merge(s)
	}
	for i := range h1.Counts {
		if h1.Counts[i] != h2.Counts[i] {
			t.Fatalf("bin %d: %v vs %v", i, h1.Counts[i], h2.Counts[i])
		}
	}
	if h1.Over != h2.Over || h1.Total() != rows {
		t.Errorf("over %v/%v total %v", h1.Over, h2.Over, h1.Total())
	}
}
