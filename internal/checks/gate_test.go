package checks

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/demo"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/freeze"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/score"
	"github.com/modelgate/modelgate/schemas"
)

var (
	demoOnce  sync.Once
	demoStore *registry.Local
	demoErr   error
	demoDir   string
)

// demoScenario builds the demo scenario once per test binary into a
// temporary local store.
func demoScenario(t *testing.T) *registry.Local {
	t.Helper()
	demoOnce.Do(func() {
		demoDir, demoErr = os.MkdirTemp("", "modelgate-checks-")
		if demoErr != nil {
			return
		}
		sc, err := demo.Build(filepath.Join(demoDir, "work"), demo.DefaultConfig(), nil)
		if err != nil {
			demoErr = err
			return
		}
		demoStore, demoErr = registry.OpenLocal(filepath.Join(demoDir, "store"))
		if demoErr != nil {
			return
		}
		_, demoErr = demo.Publish(context.Background(), demoStore, sc, nil)
	})
	if demoErr != nil {
		t.Fatal(demoErr)
	}
	return demoStore
}

func TestMain(m *testing.M) {
	code := m.Run()
	if demoDir != "" {
		os.RemoveAll(demoDir)
	}
	os.Exit(code)
}

func gate(t *testing.T, store registry.Store, cand, target, policyFile string) *Report {
	t.Helper()
	return gateAs(t, store, cand, target, target, policyFile)
}

// gateAs gates cand towards target under the policy's rule for ruleTarget.
func gateAs(t *testing.T, store registry.Store, cand, target, ruleTarget, policyFile string) *Report {
	t.Helper()
	pol, err := policy.Load(filepath.Join("..", "..", "policies", policyFile))
	if err != nil {
		t.Fatal(err)
	}
	rule, err := pol.Rule(ruleTarget)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	encTag := ""
	if et := rule.Freeze.EncoderTag; et != nil {
		if d, err := store.Resolve(ctx, et.Repository, et.Tag); err == nil {
			encTag = d.Digest.String()
		}
	}
	c, _ := registry.ParseRef(cand, false)
	tg, _ := registry.ParseRef(target, false)
	cfg := FromRule(rule, encTag)
	cfg.Budget.P50ms, cfg.Budget.P99ms, cfg.Budget.MaxRatio = nil, nil, nil // timings are never pass/fail in tests (but see TestBudgetVerdictRepeats)
	rep, err := Run(ctx, Gate{Store: store, Candidate: c, Target: tg, Holdout: rule.HoldoutRef, Config: cfg,
		Policy: Policy{Name: pol.Name, Source: policyFile, Digest: pol.Digest()}})
	if err != nil {
		t.Fatal(err)
	}
	return rep
}

func status(rep *Report) map[string]string {
	m := map[string]string{}
	for _, c := range rep.Checks {
		m[c.Name] = c.Status
	}
	return m
}

// TestDemoVerdicts: the demo's candidates get the verdicts they were built
// for (issue: better → pass; worse → holdout; misaligned vocabulary →
// contract; trainable encoder with a regulariser → freeze; oversize →
// budget).
func TestDemoVerdicts(t *testing.T) {
	store := demoScenario(t)
	cases := []struct {
		cand    string
		verdict string
		failing string // a check that must fail ("" for none)
	}{
		{"promo-scorer:cand-better", VerdictPass, ""},
		{"promo-scorer:cand-worse", VerdictFail, CheckHoldout},
		{"promo-scorer:cand-shuffled-vocab", VerdictFail, CheckContract},
		{"promo-scorer:cand-trainable-encoder", VerdictFail, CheckFreeze},
		{"promo-scorer:cand-over-budget", VerdictFail, CheckBudget},
	}
	for _, c := range cases {
		t.Run(c.cand, func(t *testing.T) {
			rep := gate(t, store, c.cand, "promo-scorer:prod", "promo-scorer.yaml")
			st := status(rep)
			if rep.Verdict != c.verdict {
				t.Fatalf("verdict %s, want %s; checks %v; reasons %v", rep.Verdict, c.verdict, st, rep.Reasons)
			}
			if c.failing != "" && st[c.failing] != StatusFail {
				t.Errorf("check %s is %s, want FAIL (checks %v)", c.failing, st[c.failing], st)
			}
			if st[CheckIntegrity] != StatusPass {
				t.Errorf("integrity %s", st[CheckIntegrity])
			}
			if rep.Baseline == nil || rep.Holdout == nil || rep.Policy.Digest == "" || rep.Candidate.Digest == "" {
				t.Errorf("report not bound to its inputs: %+v", rep)
			}
		})
	}
	// The worse candidate fails on holdout alone, the trainable-encoder one
	// on freeze alone and the over-budget one on budget alone: their other
	// checks pass. (The shuffled vocabulary fails holdout too: its outputs
	// are wrong, which is the point.)
	for _, c := range []struct{ cand, check string }{
		{"promo-scorer:cand-worse", CheckHoldout},
		{"promo-scorer:cand-trainable-encoder", CheckFreeze},
		{"promo-scorer:cand-over-budget", CheckBudget},
	} {
		rep := gate(t, store, c.cand, "promo-scorer:prod", "promo-scorer.yaml")
		for name, s := range status(rep) {
			if name != c.check && s == StatusFail {
				t.Errorf("%s: %s failed too (%v)", c.cand, name, rep.Reasons)
			}
		}
	}
	// The shuffled vocabulary is caught by the probe rows, naming them.
	rep := gate(t, store, "promo-scorer:cand-shuffled-vocab", "promo-scorer:prod", "promo-scorer.yaml")
	found := false
	for _, c := range rep.Checks {
		for _, f := range c.Findings {
			if f.Code == "contract.probe" && f.Status == StatusFail {
				found = true
			}
		}
	}
	if !found {
		t.Error("shuffled vocabulary: no failing contract.probe finding")
	}
}

// TestEncoderGate: the refitted encoder passes against the production one;
// the 192-wide encoder fails its budget.
func TestEncoderGate(t *testing.T) {
	store := demoScenario(t)
	rep := gate(t, store, "listener-encoder:v2", "listener-encoder:prod", "listener-encoder.yaml")
	if rep.Verdict != VerdictPass {
		t.Errorf("v2: verdict %s, reasons %v", rep.Verdict, rep.Reasons)
	}
	var h *HoldoutDetail
	for _, c := range rep.Checks {
		if c.Holdout != nil {
			h = c.Holdout
		}
	}
	if h == nil || h.Kind != model.KindEncoder || h.Baseline == nil || h.Candidate.Reconstruct <= 0 || len(h.Examples) == 0 {
		t.Fatalf("encoder holdout detail: %+v", h)
	}
	rep = gate(t, store, "listener-encoder:wide", "listener-encoder:prod", "listener-encoder.yaml")
	if status(rep)[CheckBudget] != StatusFail {
		t.Errorf("wide encoder: budget %s", status(rep)[CheckBudget])
	}
}

// TestFirstRelease: with no baseline the candidate is held to the
// policy's absolute thresholds.
func TestFirstRelease(t *testing.T) {
	store := demoScenario(t)
	rep := gateAs(t, store, "promo-scorer:cand-better", "promo-scorer:first-release", "promo-scorer:prod", "promo-scorer.yaml")
	if rep.Baseline != nil {
		t.Fatalf("baseline %+v on a tag that does not exist", rep.Baseline)
	}
	var hc *CheckResult
	for i := range rep.Checks {
		if rep.Checks[i].Name == CheckHoldout {
			hc = &rep.Checks[i]
		}
	}
	n := 0
	for _, f := range hc.Findings {
		if f.Code == "holdout.first-release" {
			n++
			if f.Status != StatusPass {
				t.Errorf("first-release finding %s: %s", f.Status, f.Message)
			}
		}
	}
	// No baseline: the thresholds come from the holdout's summary, not
	// from the candidate's stats.json.
	if w := hc.Holdout.Weights; w == nil || w.Source != WeightsFromHoldout || w.From != rep.Holdout.Digest {
		t.Errorf("first release weights %+v, want the holdout's summary (%s)", w, rep.Holdout.Digest)
	}
	if n != 4 || hc.Holdout.Test != nil {
		t.Errorf("first release: %d threshold findings (want 4: log loss, NE, AUC, ECE), test %+v", n, hc.Holdout.Test)
	}
	if rep.Verdict != VerdictPass {
		t.Errorf("first release of the better candidate: %s %v", rep.Verdict, rep.Reasons)
	}
}

// TestHeadNetMatchesFullNet: the latency test's head-only net, fed the
// encoder's code, gives exactly the full scorer's output.
func TestHeadNetMatchesFullNet(t *testing.T) {
	store := demoScenario(t)
	ctx := context.Background()
	for _, name := range []string{"cand-better", "cand-trainable-encoder"} {
		l, err := artifact.Load(ctx, store, registry.Ref{Repository: "promo-scorer", Tag: name})
		if err != nil {
			t.Fatal(err)
		}
		m, err := score.Prepare(l)
		if err != nil {
			t.Fatal(err)
		}
		head, codeLayer, err := headNet(m)
		if err != nil {
			t.Fatal(err)
		}
		b := &model.Batch{Indptr: []int32{0, 3, 3, 5}, Indices: []int32{1, 7, 20, 3, 3}, Values: []float32{2, 1, 5, 1, 4}, Dense: map[string][]float32{}}
		for _, d := range l.Spec.Inputs.Dense {
			v := make([]float32, 3*d.Size)
			for i := range v {
				v[i] = float32(i%5) / 5
			}
			b.Dense[d.Name] = v
		}
		r := m.Net.NewRunner(1)
		full, err := r.Run(b, m.Net.Output(), nil)
		if err != nil {
			t.Fatal(err)
		}
		code, err := r.Run(b, codeLayer, nil)
		if err != nil {
			t.Fatal(err)
		}
		hb := &model.Batch{Indptr: []int32{0, 0, 0, 0}, Dense: map[string][]float32{headCodeInput: code}}
		for k, v := range b.Dense {
			hb.Dense[k] = v
		}
		hr := head.NewRunner(1)
		got, err := hr.Run(hb, head.Output(), nil)
		if err != nil {
			t.Fatal(err)
		}
		for i := range full {
			if math.Float32bits(full[i]) != math.Float32bits(got[i]) {
				t.Errorf("%s row %d: head %v, full %v", name, i, got[i], full[i])
			}
		}
		r.Close()
		hr.Close()
	}
	_ = fmt.Sprint()
}

// TestReportsAreValidJSON: every demo report encodes as JSON and validates
// against schemas/report.schema.json.
func TestReportsAreValidJSON(t *testing.T) {
	store := demoScenario(t)
	for _, c := range []string{"cand-better", "cand-worse", "cand-shuffled-vocab", "cand-trainable-encoder", "cand-over-budget"} {
		rep := gate(t, store, "promo-scorer:"+c, "promo-scorer:prod", "promo-scorer.yaml")
		raw, err := json.Marshal(rep)
		if err != nil {
			t.Fatalf("%s: %v", c, err)
		}
		vs, err := schemas.Validate(schemas.Report, raw)
		if err != nil {
			t.Fatal(err)
		}
		for _, v := range vs {
			t.Errorf("%s: %s", c, v)
		}
	}
}

// gateConfig builds a Gate for cand towards target under the example policy.
func gateConfig(t *testing.T, store registry.Store, cand, target, policyFile string) Gate {
	t.Helper()
	pol, err := policy.Load(filepath.Join("..", "..", "policies", policyFile))
	if err != nil {
		t.Fatal(err)
	}
	rule, err := pol.Rule(target)
	if err != nil {
		t.Fatal(err)
	}
	c, _ := registry.ParseRef(cand, false)
	tg, _ := registry.ParseRef(target, false)
	cfg := FromRule(rule, "")
	cfg.Budget.P50ms, cfg.Budget.P99ms = nil, nil
	cfg.Freeze.EncoderTag = ""
	return Gate{Store: store, Candidate: c, Target: tg, Holdout: rule.HoldoutRef, Config: cfg,
		Policy: Policy{Name: pol.Name, Source: policyFile, Digest: pol.Digest()}}
}

func relClose(a, b, tol float64) bool {
	return a == b || math.Abs(a-b) <= tol*math.Max(math.Abs(a), math.Abs(b))
}

// TestShardsMergeToOneRun: 1 shard and 4 shards (each serialised as it
// would be stored) give the same verdict and the same numbers: sums to
// float64 rounding, bootstrap replicate sums identical draw for draw.
func TestShardsMergeToOneRun(t *testing.T) {
	store := demoScenario(t)
	ctx := context.Background()
	for _, tc := range []struct{ cand, target, pol string }{
		{"promo-scorer:cand-worse", "promo-scorer:prod", "promo-scorer.yaml"},
		{"listener-encoder:v2", "listener-encoder:prod", "listener-encoder.yaml"},
	} {
		g := gateConfig(t, store, tc.cand, tc.target, tc.pol)
		one, err := Run(ctx, g)
		if err != nil {
			t.Fatal(err)
		}
		var shards []*ShardResult
		for i := 0; i < 4; i++ {
			r, err := RunShard(ctx, g, i, 4)
			if err != nil {
				t.Fatal(err)
			}
			raw, err := json.Marshal(r)
			if err != nil {
				t.Fatal(err)
			}
			var back ShardResult
			if err := json.Unmarshal(raw, &back); err != nil {
				t.Fatal(err)
			}
			shards = append(shards, &back)
		}
		g.Shards = shards
		four, err := Run(ctx, g)
		if err != nil {
			t.Fatal(err)
		}
		if one.Verdict != four.Verdict {
			t.Errorf("%s: verdict %s vs %s", tc.cand, one.Verdict, four.Verdict)
		}
		h1, h4 := holdoutOf(one), holdoutOf(four)
		if h1 == nil || h4 == nil {
			t.Fatalf("%s: no holdout detail", tc.cand)
		}
		m1, m4 := h1.Candidate, h4.Candidate
		for _, p := range [][3]any{
			{"rows", float64(m1.Rows), float64(m4.Rows)}, {"weight", m1.WeightSum, m4.WeightSum},
			{"log loss", m1.LogLoss, m4.LogLoss}, {"NE", m1.NormalizedEntropy, m4.NormalizedEntropy},
			{"ECE", m1.ECE, m4.ECE}, {"pred/obs", m1.PredictedObserved, m4.PredictedObserved},
			{"recon", m1.Reconstruct, m4.Reconstruct}, {"AUC", m1.AUC, m4.AUC},
			{"mean diff", h1.Test.MeanDiff, h4.Test.MeanDiff}, {"std err", h1.Test.StdErr, h4.Test.StdErr},
			{"upper", h1.Test.Upper, h4.Test.Upper},
			{"bootstrap lower", h1.Test.BootstrapLower, h4.Test.BootstrapLower},
			{"bootstrap upper", h1.Test.BootstrapUpper, h4.Test.BootstrapUpper},
		} {
			if !relClose(p[1].(float64), p[2].(float64), 1e-12) {
				t.Errorf("%s: %s: one run %v, four shards %v", tc.cand, p[0], p[1], p[2])
			}
		}
		if len(h1.Slices) != len(h4.Slices) {
			t.Errorf("%s: %d slices vs %d", tc.cand, len(h1.Slices), len(h4.Slices))
		}
		// An incomplete set, or a shard made for other inputs, is missing
		// input (exit 2) and no report: not a failed gate (exit 1).
		g.Shards = shards[:3]
		if rep, err := Run(ctx, g); rep != nil || !errkind.Is(err, errkind.BadInput) || !strings.Contains(fmt.Sprint(err), "missing shard results: [4/4]") {
			t.Errorf("%s: merging 3 of 4 shards: report %v, error %v; want no report and a bad-input error naming 4/4", tc.cand, rep != nil, err)
		}
		other := *shards[3]
		other.Policy = "sha256:" + strings.Repeat("0", 64)
		g.Shards = append(append([]*ShardResult{}, shards[:3]...), &other)
		if rep, err := Run(ctx, g); rep != nil || !errkind.Is(err, errkind.BadInput) || !strings.Contains(fmt.Sprint(err), "made for other inputs") {
			t.Errorf("%s: a shard of another policy: report %v, error %v; want a bad-input error", tc.cand, rep != nil, err)
		}
	}
}

func holdoutOf(r *Report) *HoldoutDetail {
	for _, c := range r.Checks {
		if c.Holdout != nil {
			return c.Holdout
		}
	}
	return nil
}

func holdoutStatus(r *Report) string {
	if r == nil {
		return ""
	}
	return status(r)[CheckHoldout]
}

// TestFrozenCandidatePasses: freezing the demo's trainable-encoder
// candidate gives a scorer that passes the whole gate, the freeze check
// included (with the freeze package's output verification).
func TestFrozenCandidatePasses(t *testing.T) {
	store := demoScenario(t)
	ctx := context.Background()
	out := registry.Ref{Repository: "promo-scorer", Tag: "cand-frozen"}
	if _, err := freeze.Scorer(ctx, store, registry.Ref{Repository: "promo-scorer", Tag: "cand-trainable-encoder"}, freeze.Options{Out: out}); err != nil {
		t.Fatal(err)
	}
	g := gateConfig(t, store, "promo-scorer:cand-frozen", "promo-scorer:prod", "promo-scorer.yaml")
	g.Config.Freeze.RequireFrozen = true
	rep, err := Run(ctx, g)
	if err != nil {
		t.Fatal(err)
	}
	if rep.Verdict != VerdictPass {
		t.Fatalf("frozen candidate: %s %v", rep.Verdict, rep.Reasons)
	}
	for _, c := range rep.Checks {
		if c.Name == CheckFreeze && !strings.Contains(c.Summary, "unfrozen composition") {
			t.Errorf("freeze summary does not report the output verification: %s", c.Summary)
		}
	}
}

// TestHoldoutSliceColumn: the holdout's own slice column (the demo's
// listener cohorts) gets per-value results, on top of the nonzero-count
// slices. Each grouping partitions the rows: row counts match the
// holdout's summary, weights and weighted log-loss sums add up to the
// all-rows figures (log loss is a weighted mean, so sums add).
func TestHoldoutSliceColumn(t *testing.T) {
	store := demoScenario(t)
	rep := gate(t, store, "promo-scorer:cand-better", "promo-scorer:prod", "promo-scorer.yaml")
	var det *HoldoutDetail
	for _, c := range rep.Checks {
		if c.Name == CheckHoldout {
			det = c.Holdout
		}
	}
	if det == nil {
		t.Fatal("no holdout detail")
	}
	hold, err := artifact.FetchHoldout(context.Background(), store, registry.Ref{Repository: "promo-holdout", Tag: "v1"})
	if err != nil {
		t.Fatal(err)
	}
	defer hold.Close()
	if len(hold.Info.Slices) != 3 {
		t.Fatalf("the demo holdout has slice values %v, want 3 cohorts", hold.Info.Slices)
	}
	var segRows, nzRows int64
	var segW, segLoss, nzW, nzLoss float64
	seen := 0
	for _, s := range det.Slices {
		wl := s.Candidate.WeightSum * s.Candidate.WeightedLogLoss
		if strings.HasPrefix(s.Name, "holdout slice ") {
			seen++
			v, err := strconv.Unquote(strings.TrimPrefix(s.Name, "holdout slice "))
			if err != nil {
				t.Fatalf("slice name %q: %v", s.Name, err)
			}
			if s.Rows != hold.Info.Slices[v] {
				t.Errorf("%s: %d rows, the holdout summary says %d", s.Name, s.Rows, hold.Info.Slices[v])
			}
			if s.Baseline == nil || s.Test == nil {
				t.Errorf("%s: no baseline comparison", s.Name)
			}
			segRows, segW, segLoss = segRows+s.Rows, segW+s.Candidate.WeightSum, segLoss+wl
		} else {
			nzRows, nzW, nzLoss = nzRows+s.Rows, nzW+s.Candidate.WeightSum, nzLoss+wl
		}
	}
	if seen != 3 {
		t.Errorf("%d holdout-slice results, want 3", seen)
	}
	all := det.Candidate
	for _, g := range []struct {
		name  string
		rows  int64
		w, wl float64
	}{{"holdout slices", segRows, segW, segLoss}, {"nonzero slices", nzRows, nzW, nzLoss}} {
		if g.rows != all.Rows || math.Abs(g.w-all.WeightSum) > 1e-9*all.WeightSum ||
			math.Abs(g.wl-all.WeightSum*all.WeightedLogLoss) > 1e-9*all.WeightSum*all.WeightedLogLoss {
			t.Errorf("%s: %d rows, weight %.9g, weighted loss %.9g; all rows: %d, %.9g, %.9g",
				g.name, g.rows, g.w, g.wl, all.Rows, all.WeightSum, all.WeightSum*all.WeightedLogLoss)
		}
	}
}

// TestWaitShards: a merge started with its shards waits until every shard
// result is stored, and says which are missing when its time runs out.
func TestWaitShards(t *testing.T) {
	store := demoScenario(t)
	ctx := context.Background()
	g := gateConfig(t, store, "promo-scorer:cand-worse", "promo-scorer:prod", "promo-scorer.yaml")
	g.Policy.Digest = "sha256:" + strings.Repeat("7", 64) // this test's own shard set
	var results []*ShardResult
	for i := 0; i < 3; i++ {
		r, err := RunShard(ctx, g, i, 3)
		if err != nil {
			t.Fatal(err)
		}
		results = append(results, r)
	}
	for _, r := range results[:2] {
		if _, err := PushShard(ctx, store, "promo-scorer", r); err != nil {
			t.Fatal(err)
		}
	}
	r0 := results[0]
	cd, err := registry.ParseDigest(r0.Candidate)
	if err != nil {
		t.Fatal(err)
	}
	wait := func(w ShardWait) error {
		return WaitShards(ctx, store, "promo-scorer", cd, r0.Target, r0.Baseline, r0.Holdout, r0.Policy, w)
	}
	err = wait(ShardWait{Timeout: 30 * time.Millisecond, Poll: 5 * time.Millisecond})
	if !errkind.Is(err, errkind.BadInput) || !strings.Contains(fmt.Sprint(err), "[3/3]") {
		t.Fatalf("2 of 3 stored, time out: %v; want a bad-input error naming 3/3", err)
	}
	var seen []string
	err = wait(ShardWait{Timeout: time.Hour, Poll: time.Millisecond, Progress: func(have, of int) {
		seen = append(seen, fmt.Sprintf("%d/%d", have, of))
		if len(seen) == 1 { // the last shard lands while the merge waits
			if _, err := PushShard(ctx, store, "promo-scorer", results[2]); err != nil {
				t.Error(err)
			}
		}
	}})
	if err != nil || strings.Join(seen, " ") != "2/3 3/3" {
		t.Fatalf("waiting while the last shard lands: %v, progress %v; want nil after 2/3 3/3", err, seen)
	}
	err = WaitShards(ctx, store, "promo-scorer", cd, r0.Target, r0.Baseline, r0.Holdout, "sha256:"+strings.Repeat("8", 64), ShardWait{Timeout: 10 * time.Millisecond, Poll: time.Millisecond})
	if !errkind.Is(err, errkind.BadInput) || !strings.Contains(fmt.Sprint(err), "no shard result") {
		t.Fatalf("no shards for these inputs: %v", err)
	}
}
