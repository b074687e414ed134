package stats

import (
	"math"
	"slices"
	"testing"
)

// clusteredRows: the scored rows of makeScored grouped into clusters of
// uneven size (1 to 7 rows), a cluster's rows spread over the file.
func clusteredRows(n int) (scoredRows, []uint64) {
	r := makeScored(41, n)
	cl := make([]uint64, n)
	g := uint64(0)
	for i := 0; i < n; {
		size := 1 + int(g%7)
		for j := 0; j < size && i < n; j++ {
			cl[i] = g*2654435761 + 17 // arbitrary keys
			i++
		}
		g++
	}
	// Spread each cluster's rows: interleave the two halves of the file.
	perm := make([]int, n)
	for i := range perm {
		if i%2 == 0 {
			perm[i] = i / 2
		} else {
			perm[i] = n/2 + i/2
		}
	}
	out := scoredRows{ids: make([]int64, n), base: make([]float32, n), cand: make([]float32, n), y: make([]float32, n), w: make([]float32, n),
		lossB: make([]float64, n), lossC: make([]float64, n)}
	cls := make([]uint64, n)
	for i, p := range perm {
		out.ids[i], out.base[i], out.cand[i], out.y[i], out.w[i] = r.ids[p], r.base[p], r.cand[p], r.y[p], r.w[p]
		out.lossB[i], out.lossC[i], cls[i] = r.lossB[p], r.lossC[p], cl[p]
	}
	return out, cls
}

// TestClusterRobustVsNumpy: the clustered test's standard error, degrees
// of freedom, t and skewness equal a computation in numpy of the CR1
// sandwich for a weighted mean (an intercept-only weighted regression):
// Var = G/(G−1) · Σ_g (Σ_{i∈g} w_i (d_i − m))² / (Σ w)², df = G − 1
// (Cameron and Miller 2015, "A Practitioner's Guide to Cluster-Robust
// Inference", Journal of Human Resources 50(2): 317–372, sections II.C
// and VI; the CR1 factor c = G/(G−1)·(N−1)/(N−K) with K = 1), with
// scipy's t distribution for the bound (checked at mpmath precision in
// TestCrossCheckWithPython).
func TestClusterRobustVsNumpy(t *testing.T) {
	const n = 3001
	r, cl := clusteredRows(n)
	d := r.diffs(0, n)
	for _, unit := range []bool{true, false} {
		a, err := NewClusteredPaired(5, 0)
		if err != nil {
			t.Fatal(err)
		}
		w := r.w
		if unit {
			w = nil
		}
		if err := a.AddBatchClustered(r.ids, cl, d, w); err != nil {
			t.Fatal(err)
		}
		res, err := a.NonInferiority(0.001, 0.95)
		if err != nil {
			t.Fatal(err)
		}
		ws := make([]float64, n)
		keys := make([]float64, n) // cluster keys as labels: exact in float64 below 2^53
		for i := range ws {
			ws[i] = 1
			if !unit {
				ws[i] = float64(r.w[i])
			}
			keys[i] = float64(cl[i] % (1 << 52))
		}
		var out struct {
			SE, DF, T, Upper, Skew float64
			G                      int
		}
		runPythonWith(t, "numpy, scipy", clusterScript, map[string]any{"d": d, "w": ws, "g": keys, "margin": 0.001}, &out)
		if res.Clusters != int64(out.G) || res.DF != out.DF {
			t.Errorf("unit=%v: %d clusters, df %v; numpy %d, %v", unit, res.Clusters, res.DF, out.G, out.DF)
		}
		near(t, "cluster-robust SE vs numpy", res.StdErr, out.SE, 1e-12)
		near(t, "cluster-robust t vs numpy", res.T, out.T, 1e-11)
		near(t, "cluster skewness vs numpy", res.Skewness, out.Skew, 1e-10)
		near(t, "cluster-robust upper vs scipy", res.Upper, out.Upper, 1e-9)
	}
}

// clusterScript computes the CR1 standard error of the weighted mean with
// numpy (formula above) and the bound with scipy's t quantile.
const clusterScript = `
import json, sys
import numpy as np
from scipy import stats
d = json.load(open(sys.argv[1]))
x, w, g = np.array(d["d"]), np.array(d["w"]), np.array(d["g"])
m = np.sum(w * x) / np.sum(w)
labels, inv = np.unique(g, return_inverse=True)
G = len(labels)
u = np.bincount(inv, weights=w * (x - m))
V = G / (G - 1) * np.sum(u ** 2) / np.sum(w) ** 2
se = float(np.sqrt(V))
skew = float(np.mean(u ** 3) / np.mean(u ** 2) ** 1.5)
print(json.dumps({"SE": se, "DF": G - 1, "G": G, "T": float((m - d["margin"]) / se),
                  "Upper": float(m + stats.t.ppf(0.95, G - 1) * se), "Skew": skew}))
`

// TestClusteredSingletonsAreTheTTest: with one row per cluster and unit
// weights the clustered test is the ordinary one (CR1 reduces to s²/n).
func TestClusteredSingletonsAreTheTTest(t *testing.T) {
	r := makeScored(7, 2000)
	d := r.diffs(0, 2000)
	plain := mustPaired(t, 3, 0)
	if err := plain.AddBatch(r.ids, d, nil); err != nil {
		t.Fatal(err)
	}
	cl, err := NewClusteredPaired(3, 0)
	if err != nil {
		t.Fatal(err)
	}
	keys := make([]uint64, len(r.ids))
	for i, id := range r.ids {
		keys[i] = uint64(id)
	}
	if err := cl.AddBatchClustered(r.ids, keys, d, nil); err != nil {
		t.Fatal(err)
	}
	a, _ := plain.NonInferiority(0.001, 0.95)
	b, _ := cl.NonInferiority(0.001, 0.95)
	near(t, "SE", b.StdErr, a.StdErr, 1e-12)
	near(t, "upper", b.Upper, a.Upper, 1e-12)
	near(t, "skewness", b.Skewness, a.Skewness, 1e-9)
	if b.DF != a.DF || b.Clusters != 2000 || a.Clusters != 0 {
		t.Errorf("df %v vs %v, clusters %d and %d", b.DF, a.DF, b.Clusters, a.Clusters)
	}
}

// TestClusteredShardsMerge: a clustered accumulator fed in shards whose
// boundaries split clusters, in another row order, and passed through its
// binary encoding, gives the one-pass test: the cluster sums merge, and
// every bootstrap replicate takes or leaves a whole cluster.
func TestClusteredShardsMerge(t *testing.T) {
	const n, reps = 2500, 64
	r, cl := clusteredRows(n)
	d := r.diffs(0, n)
	one, _ := NewClusteredPaired(9, reps)
	if err := one.AddBatchClustered(r.ids, cl, d, r.w); err != nil {
		t.Fatal(err)
	}
	merged, _ := NewClusteredPaired(9, reps)
	for _, b := range [][2]int{{1700, n}, {0, 333}, {333, 1700}} { // shards, out of order
		s, _ := NewClusteredPaired(9, reps)
		if err := s.AddBatchClustered(r.ids[b[0]:b[1]], cl[b[0]:b[1]], d[b[0]:b[1]], r.w[b[0]:b[1]]); err != nil {
			t.Fatal(err)
		}
		raw, err := s.MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		var back Paired
		if err := back.UnmarshalBinary(raw); err != nil {
			t.Fatal(err)
		}
		if again, _ := back.MarshalBinary(); string(again) != string(raw) {
			t.Error("clustered encoding is not canonical")
		}
		if err := merged.Merge(&back); err != nil {
			t.Fatal(err)
		}
	}
	a, _ := one.NonInferiority(0.001, 0.95)
	b, _ := merged.NonInferiority(0.001, 0.95)
	for _, p := range [][3]any{{"mean", a.MeanDiff, b.MeanDiff}, {"SE", a.StdErr, b.StdErr}, {"upper", a.Upper, b.Upper},
		{"skewness", a.Skewness, b.Skewness}, {"bootstrap lower", a.BootstrapLower, b.BootstrapLower}, {"bootstrap upper", a.BootstrapUpper, b.BootstrapUpper}} {
		near(t, "merged "+p[0].(string), p[2].(float64), p[1].(float64), 1e-12)
	}
	if a.Clusters != b.Clusters || a.DF != b.DF {
		t.Errorf("clusters %d vs %d", a.Clusters, b.Clusters)
	}
	// Replicate r's sums are Σ_g k_g·(Σw·d, Σw) with k_g the cluster's
	// Poisson draw, computed here from the cluster totals.
	type tot struct{ wd, w float64 }
	totals := map[uint64]*tot{}
	for i := range d {
		if totals[cl[i]] == nil {
			totals[cl[i]] = &tot{}
		}
		totals[cl[i]].wd += float64(r.w[i]) * d[i]
		totals[cl[i]].w += float64(r.w[i])
	}
	keys := make([]uint64, 0, len(totals))
	for k := range totals {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	mix := mix64(9)
	for rep := range reps {
		var sw, swd float64
		for _, k := range keys {
			kd := float64(poissonDraw(rowKey(mix, int64(k)), rep))
			sw += kd * totals[k].w
			swd += kd * totals[k].wd
		}
		gw, gwd := one.ReplicateSums(rep)
		if math.Abs(gw-sw) > 1e-9*sw || math.Abs(gwd-swd) > 1e-9*math.Abs(swd)+1e-12 {
			t.Fatalf("replicate %d: sums (%v, %v), from cluster totals (%v, %v)", rep, gw, gwd, sw, swd)
		}
	}
	// Modes do not mix.
	plain := mustPaired(t, 9, reps)
	if err := merged.Merge(plain); err == nil {
		t.Error("merging an unclustered accumulator into a clustered one was accepted")
	}
	if err := one.AddBatch(r.ids[:1], d[:1], nil); err == nil {
		t.Error("AddBatch on a clustered accumulator was accepted")
	}
	if err := plain.AddBatchClustered(r.ids[:1], cl[:1], d[:1], nil); err == nil {
		t.Error("AddBatchClustered on an unclustered accumulator was accepted")
	}
}

// TestCochranRule: a sample whose difference is one large value among
// small ones has skewness near √n, so n > 25·γ² cannot hold and the test
// fails although its t bound is below the margin; the same values without
// the large one pass, and so do they with one large gain instead.
func TestCochranRule(t *testing.T) {
	const n = 400
	d := make([]float64, n)
	ids := make([]int64, n)
	for i := range d {
		ids[i] = int64(i)
		d[i] = -0.002 + 0.0005*math.Sin(float64(i))
	}
	clean := mustPaired(t, 1, 0)
	if err := clean.AddBatch(ids, d, nil); err != nil {
		t.Fatal(err)
	}
	c, _ := clean.NonInferiority(0.001, 0.95)
	d[7] = 0.4
	heavy := mustPaired(t, 1, 0)
	if err := heavy.AddBatch(ids, d, nil); err != nil {
		t.Fatal(err)
	}
	h, _ := heavy.NonInferiority(0.001, 0.95)
	// Skewness of one outlier x among n−1 equal values: (n−2)/√(n−1).
	near(t, "skewness of one outlier", h.Skewness, (n-2)/math.Sqrt(n-1), 0.01)
	if !c.Pass || h.Upper >= 0.001 || h.Pass || h.MinRows != 25*h.Skewness*h.Skewness {
		t.Errorf("clean pass %v; heavy upper %v, skewness %v, min rows %v, pass %v", c.Pass, h.Upper, h.Skewness, h.MinRows, h.Pass)
	}
	// Skewed the other way (a candidate winning big on one row) the t
	// bound is conservative: the rule does not apply.
	d[7] = -0.4
	win := mustPaired(t, 1, 0)
	if err := win.AddBatch(ids, d, nil); err != nil {
		t.Fatal(err)
	}
	l, _ := win.NonInferiority(0.001, 0.95)
	if l.Skewness > -10 || l.MinRows != 0 || !l.Pass {
		t.Errorf("left-skewed: skewness %v, min rows %v, pass %v", l.Skewness, l.MinRows, l.Pass)
	}
}

// TestTailExcess: excess and divergence by hand. Candidate e^−12 where the
// baseline says 0.02: the candidate loses 12 + log(0.02) nats more if the
// label is 1; the divergence is KL(Bernoulli(0.02) ‖ Bernoulli(e^−12)).
func TestTailExcess(t *testing.T) {
	c, b := math.Exp(-12), 0.02
	e, kl := TailExcess(c, b)
	near(t, "excess", e, 12+math.Log(b), 1e-12)
	wantKL := b*math.Log(b/c) + (1-b)*math.Log((1-b)/(1-c))
	near(t, "divergence", kl, wantKL, 1e-12)
	// Symmetric case: the bet against label 0.
	e0, _ := TailExcess(1-c, 1-b)
	near(t, "excess, other side", e0, 12+math.Log(b), 1e-9)
	// Equal predictions: nothing.
	if e, kl := TailExcess(0.3, 0.3); e != 0 || kl != 0 {
		t.Errorf("equal predictions: excess %v, divergence %v", e, kl)
	}
	// A baseline confidently wrong and a candidate that is not: the
	// candidate bets against nothing harder than the baseline.
	if e, _ := TailExcess(0.02, c); e > 0.03 {
		t.Errorf("a candidate fixing the baseline's confident mistake has excess %v", e)
	}
}

// TestTailMergeAndEncode: a Tail fed in shards, in any order, through its
// encoding, equals the one-pass Tail: counts, exposure and worst rows.
func TestTailMergeAndEncode(t *testing.T) {
	const n = 5000
	r := makeScored(3, n)
	// Make a rare group confidently wrong: every 97th row.
	for i := 0; i < n; i += 97 {
		r.cand[i], r.base[i] = float32(math.Exp(-12)), 0.02
	}
	one, err := NewTail(5)
	if err != nil {
		t.Fatal(err)
	}
	if err := one.AddBatch(r.ids, r.cand, r.base, r.y, r.w); err != nil {
		t.Fatal(err)
	}
	merged, _ := NewTail(5)
	for _, b := range [][2]int{{4000, n}, {0, 1234}, {1234, 4000}} {
		s, _ := NewTail(5)
		if err := s.AddBatch(r.ids[b[0]:b[1]], r.cand[b[0]:b[1]], r.base[b[0]:b[1]], r.y[b[0]:b[1]], r.w[b[0]:b[1]]); err != nil {
			t.Fatal(err)
		}
		raw, _ := s.MarshalBinary()
		var back Tail
		if err := back.UnmarshalBinary(raw); err != nil {
			t.Fatal(err)
		}
		if err := merged.Merge(&back); err != nil {
			t.Fatal(err)
		}
	}
	a, b := one.Summary(), merged.Summary()
	if a.Flagged != b.Flagged || a.Rows != b.Rows || len(a.Worst) != TailWorst || !slices.Equal(a.Worst, b.Worst) {
		t.Errorf("one pass %+v\nmerged %+v", a, b)
	}
	near(t, "exposure", b.Exposure, a.Exposure, 1e-12)
	// The flagged rows are exactly the rare group; their exposure is
	// their share of the weight times the divergence.
	var sw, sg float64
	flagged := 0
	_, kl := TailExcess(float64(float32(math.Exp(-12))), float64(float32(0.02)))
	for i := range r.w {
		sw += float64(r.w[i])
		if i%97 == 0 {
			sg += float64(r.w[i])
			flagged++
		}
	}
	if a.Flagged != int64(flagged) {
		t.Errorf("%d rows flagged, want %d", a.Flagged, flagged)
	}
	near(t, "exposure by hand", a.Exposure, sg*kl/sw, 1e-12)
	if other, _ := NewTail(4); other.Merge(one) == nil {
		t.Error("merging tails with different thresholds was accepted")
	}
	if _, err := NewTail(math.NaN()); err == nil {
		t.Error("NaN threshold accepted")
	}
}
