package checks

import (
	"fmt"
	"math"
	"sort"
	"strings"

	"gonum.org/v1/gonum/stat/distuv"
)

// DefaultMinSliceRows is the fewest rows a slice needs to be judged.
// Per-row loss differences are skewed; Cochran's rule for the normal
// approximation of a mean, n > 25·G1² (W. G. Cochran, Sampling
// Techniques, 3rd ed., Wiley 1977, §2.15), asks for 100 rows at a
// skewness of 2, common for log-loss differences. Smaller slices are
// reported, not judged.
const DefaultMinSliceRows = 100

// SliceHarm is the per-slice test for evidence of harm: H0: mean(d) ≤
// margin against H1: mean(d) > margin (the candidate loses more than the
// margin on the slice), one-sided t, with Holm's step-down correction
// across every slice tested.
type SliceHarm struct {
	Margin float64 `json:"margin"`
	// Lower is the lower one-sided confidence bound of the slice's mean
	// difference (uncorrected).
	Lower float64 `json:"lower"`
	// P is the one-sided p-value of H0; PAdjusted the Holm-adjusted one
	// over Tested slices; Harm is PAdjusted ≤ 1 − confidence.
	P         float64 `json:"p"`
	PAdjusted float64 `json:"pAdjusted"`
	Tested    int     `json:"tested"`
	Harm      bool    `json:"harm"`
}

// holm returns Holm's step-down adjusted p-values (S. Holm, "A simple
// sequentially rejective multiple test procedure", Scandinavian Journal of
// Statistics 6(2), 1979, 65–70): with the m p-values sorted ascending,
// p̃(i) = min(1, max over j ≤ i of (m − j + 1)·p(j)); hypothesis i is
// rejected at level α when p̃(i) ≤ α. It controls the chance of any false
// rejection (the family-wise error rate) at α under any dependence.
func holm(p []float64) []float64 {
	m := len(p)
	idx := make([]int, m)
	for i := range idx {
		idx[i] = i
	}
	sort.SliceStable(idx, func(a, b int) bool { return p[idx[a]] < p[idx[b]] })
	adj := make([]float64, m)
	run := 0.0
	for k, i := range idx {
		v := math.Min(1, float64(m-k)*p[i])
		run = math.Max(run, v)
		adj[i] = run
	}
	return adj
}

// judgeSlices runs the harm test on every slice with a test and at least
// minRows rows, Holm-corrected across them (Holm rather than Benjamini–
// Hochberg: a warning, or with failOnSlice a refusal, on a slice that is
// not harmed costs a release manager's trust or a release, so the chance
// of any false one is what must stay at 1 − confidence; BH bounds only
// the expected share of false ones among those flagged). It returns, per
// slice index, the harm result (nil when not judged).
func judgeSlices(tests []*NonInferiority, rows []int64, margin, confidence float64, minRows int) []*SliceHarm {
	out := make([]*SliceHarm, len(tests))
	var which []int
	var ps []float64
	for i, t := range tests {
		if t == nil || rows[i] < int64(minRows) || !(t.DF > 0) {
			continue
		}
		h := &SliceHarm{Margin: margin}
		// t.T is (mean − test margin)/se for the test's margin; recompute
		// for this margin.
		se := t.StdErr
		var z float64
		switch {
		case se > 0:
			z = (t.MeanDiff - margin) / se
		case t.MeanDiff > margin:
			z = math.Inf(1)
		case t.MeanDiff < margin:
			z = math.Inf(-1)
		}
		dist := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: t.DF}
		h.P = dist.Survival(z)
		h.Lower = t.MeanDiff
		if se > 0 {
			h.Lower -= dist.Quantile(confidence) * se
		}
		out[i] = h
		which = append(which, i)
		ps = append(ps, h.P)
	}
	adj := holm(ps)
	for k, i := range which {
		out[i].PAdjusted, out[i].Tested = adj[k], len(which)
		out[i].Harm = adj[k] <= 1-confidence
	}
	return out
}

// sliceLine says what decided about one harmed slice, with its numbers.
func sliceLine(name string, rows int64, lossName string, t *NonInferiority, h *SliceHarm, confidence float64) string {
	if !strings.HasPrefix(name, "holdout slice ") {
		name = "slice " + name
	}
	return fmt.Sprintf("%s (%d rows) is worse than its margin: mean %s difference %+.5f, lower %.0f%% bound %+.5f > slice margin %.5f (p = %.3g, Holm-adjusted over %d slices %.3g)",
		name, rows, lossName, t.MeanDiff, 100*confidence, h.Lower, h.Margin, h.P, h.Tested, h.PAdjusted)
}
