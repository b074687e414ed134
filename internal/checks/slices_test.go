package checks

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// TestHolmMatchesStatsmodels: Holm's adjusted p-values and decisions equal
// statsmodels' multipletests(method="holm") — a worked example computed
// once with statsmodels 0.13.5 (Debian python3-statsmodels), and, when
// that library is installed, 200 random sets of p-values checked live.
func TestHolmMatchesStatsmodels(t *testing.T) {
	// statsmodels 0.13.5: multipletests([0.008, 0.04, 0.03, 0.005, 0.20,
	// 0.013], alpha=0.05, method="holm") → reject [T, F, F, T, F, F],
	// adjusted [0.04, 0.09, 0.09, 0.03, 0.2, 0.052].
	p := []float64{0.008, 0.04, 0.03, 0.005, 0.20, 0.013}
	want := []float64{0.04, 0.09, 0.09, 0.03, 0.2, 0.052}
	wantReject := []bool{true, false, false, true, false, false}
	got := holm(p)
	for i := range p {
		if math.Abs(got[i]-want[i]) > 1e-12 || (got[i] <= 0.05) != wantReject[i] {
			t.Errorf("p[%d] = %v: adjusted %v (reject %v), statsmodels %v (reject %v)", i, p[i], got[i], got[i] <= 0.05, want[i], wantReject[i])
		}
	}
	if msg, err := exec.Command("/usr/bin/python3", "-c", "import statsmodels").CombinedOutput(); err != nil {
		t.Logf("statsmodels not installed, live comparison skipped: %v %s", err, msg)
		return
	}
	rng := rand.New(rand.NewPCG(14, 4))
	var sets [][]float64
	for k := 0; k < 200; k++ {
		m := 1 + rng.IntN(12)
		ps := make([]float64, m)
		for i := range ps {
			ps[i] = math.Pow(rng.Float64(), 1+3*rng.Float64()) // many small ones
		}
		sets = append(sets, ps)
	}
	var ref struct {
		Adj    [][]float64
		Reject [][]bool
	}
	runSklearn(t, `
import json, sys
from statsmodels.stats.multitest import multipletests
d = json.load(open(sys.argv[1]))
out = {"Adj": [], "Reject": []}
for ps in d:
    r = multipletests(ps, alpha=0.05, method="holm")
    out["Adj"].append([float(x) for x in r[1]])
    out["Reject"].append([bool(x) for x in r[0]])
print(json.dumps(out))
`, sets, &ref)
	for k, ps := range sets {
		adj := holm(ps)
		for i := range ps {
			if math.Abs(adj[i]-ref.Adj[k][i]) > 1e-12 || (adj[i] <= 0.05) != ref.Reject[k][i] {
				t.Fatalf("set %d %v: ours %v, statsmodels %v %v", k, ps, adj, ref.Adj[k], ref.Reject[k])
			}
		}
	}
}

// cohortWorseCandidate pushes a copy of the demo's better candidate that
// is worse on new listeners only: one extra ReLU unit reads the listener's
// tenure feature log1p(days)/7 and is nonzero only below 59 days (the
// demo's "new" cohort is tenure < 60 days), adding up to about two logits
// of overconfidence for them; every other row scores exactly as before.
func cohortWorseCandidate(t *testing.T, store registry.Store) string {
	t.Helper()
	ctx := context.Background()
	dir := filepath.Join(t.TempDir(), "cohort-worse")
	if _, err := artifact.Pull(ctx, store, registry.Ref{Repository: "promo-scorer", Tag: "cand-better"}, dir, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
	d, err := modeldir.Read(dir)
	if err != nil {
		t.Fatal(err)
	}
	m := d.Model
	spec := m.Spec
	cut := math.Log1p(59) / 7
	const slope, gain = 1.0, 5.0
	spec.Layers = append([]model.Layer{{Name: "new_listener", Op: "dense", Input: "listener", Weight: "new.w", Bias: "new.b", Activation: model.ActReLU}}, spec.Layers...)
	var headW *model.Tensor
	for i := range spec.Layers {
		if spec.Layers[i].Op == "concat" {
			spec.Layers[i].Inputs = append(spec.Layers[i].Inputs, "new_listener")
		}
	}
	for i := range spec.Tensors {
		if spec.Tensors[i].Name == "head.w" {
			headW = &spec.Tensors[i]
		}
	}
	if headW == nil {
		t.Fatal("no head.w in the better candidate")
	}
	headW.Shape[0]++
	m.Tensors["head.w"] = append(m.Tensors["head.w"], gain)
	spec.Tensors = append(spec.Tensors,
		model.Tensor{Name: "new.w", File: headW.File, Shape: []int{2, 1}, DType: headW.DType, Part: headW.Part},
		model.Tensor{Name: "new.b", File: headW.File, Shape: []int{1}, DType: headW.DType, Part: headW.Part})
	m.Tensors["new.w"] = []float32{-slope, 0}
	m.Tensors["new.b"] = []float32{float32(slope * cut)}
	out := filepath.Join(t.TempDir(), "cohort-worse-out")
	if err := modeldir.Write(out, m); err != nil {
		t.Fatal(err)
	}
	ref := registry.Ref{Repository: "promo-scorer", Tag: "cand-cohort-worse"}
	if _, err := artifact.PushModelDir(ctx, store, out, ref, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
	return ref.String()
}

// TestSliceWarnings: slices warn only on evidence of harm. The demo's
// better candidate gets no WARN anywhere in its report (its small slices
// are shown as too few rows to judge); a candidate worse on the new
// listeners by a clear margin warns on that cohort (and on no other
// cohort), and with failOnSlice fails with a line naming the slice.
func TestSliceWarnings(t *testing.T) {
	store := demoScenario(t)
	rep := gate(t, store, "promo-scorer:cand-better", "promo-scorer:prod", "promo-scorer.yaml")
	for _, c := range rep.Checks {
		if c.Status == StatusWarn {
			t.Errorf("better candidate: check %s is WARN: %s", c.Name, c.Summary)
		}
		for _, f := range c.Findings {
			if f.Status == StatusWarn || f.Status == StatusFail {
				t.Errorf("better candidate: %s finding %s: %s", f.Status, f.Code, f.Message)
			}
		}
	}
	det := holdoutOf(rep)
	judged, small := 0, 0
	for _, s := range det.Slices {
		switch {
		case s.Harm != nil:
			judged++
		case s.Status == StatusSkip && strings.Contains(s.Note, "too few rows"):
			small++
		}
	}
	if judged < 5 || small < 1 {
		t.Errorf("better candidate: %d slices judged, %d too small; want the cohorts and nonzero slices judged and the anomalous one too small", judged, small)
	}

	worse := cohortWorseCandidate(t, store)
	for _, failOn := range []bool{false, true} {
		g := gateConfig(t, store, worse, "promo-scorer:prod", "promo-scorer.yaml")
		g.Config.Contract.Enabled = false // its probe rows predate the extra unit
		g.Config.Budget.Enabled = false
		g.Config.Holdout.FailOnSlice = failOn
		rep, err := Run(context.Background(), g)
		if err != nil {
			t.Fatal(err)
		}
		var hc *CheckResult
		for i := range rep.Checks {
			if rep.Checks[i].Name == CheckHoldout {
				hc = &rep.Checks[i]
			}
		}
		want := StatusWarn
		if failOn {
			want = StatusFail
		}
		var newCohort *SliceResult
		for i, s := range hc.Holdout.Slices {
			if s.Name == SegmentSliceName("new") {
				newCohort = &hc.Holdout.Slices[i]
			}
			if (s.Name == SegmentSliceName("regular") || s.Name == SegmentSliceName("heavy")) && s.Status != StatusPass {
				t.Errorf("failOnSlice %v: cohort %s is %s, its rows score as the better candidate's", failOn, s.Name, s.Status)
			}
		}
		if newCohort == nil || newCohort.Harm == nil {
			t.Fatalf("failOnSlice %v: no judged slice for the new cohort: %+v", failOn, newCohort)
		}
		t.Logf("failOnSlice %v: new cohort %d rows, mean diff %+.4f, lower bound %+.4f vs margin %.4f, Holm p %.3g; overall upper %+.5f; check %s: %s",
			failOn, newCohort.Rows, newCohort.Test.MeanDiff, newCohort.Harm.Lower, newCohort.Harm.Margin, newCohort.Harm.PAdjusted, hc.Holdout.Test.Upper, hc.Status, hc.Summary)
		if newCohort.Status != want || hc.Status != want {
			t.Errorf("failOnSlice %v: new cohort %s, check %s; want %s", failOn, newCohort.Status, hc.Status, want)
		}
		if !hc.Holdout.Test.Pass {
			t.Errorf("the cohort-worse candidate should still pass overall (upper %+.5f)", hc.Holdout.Test.Upper)
		}
		if failOn && (!strings.Contains(hc.Summary, fmt.Sprintf(`holdout slice "new" (%d rows) is worse than its margin`, newCohort.Rows)) || !strings.Contains(hc.Summary, "lower 95% bound")) {
			t.Errorf("the failing line does not name the slice and its numbers: %s", hc.Summary)
		}
		if failOn && (rep.Verdict != VerdictFail || !strings.Contains(strings.Join(rep.Reasons, "\n"), "new")) {
			t.Errorf("verdict %s, reasons %v", rep.Verdict, rep.Reasons)
		}
	}
}
