package checks

import (
	"context"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// TestBudgetVerdictRepeats: ten consecutive gates of the demo's better
// candidate, with the demo policy's budget as written (latency limits and
// ratio included), give the same budget verdict, item by item, and the
// same load-memory count. The latency limits are judged on medians over
// blocks of thread CPU time, far from the demo models' figures, so a busy
// machine does not flip them; load memory is counted from an in-memory
// copy with the collector off, so it does not move between runs (it moved
// by megabytes when it was a heap delta around the first load).
func TestBudgetVerdictRepeats(t *testing.T) {
	store := demoScenario(t)
	pol, err := policy.Load(filepath.Join("..", "..", "policies", "promo-scorer.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	rule, err := pol.Rule("promo-scorer:prod")
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	encTag := ""
	if d, err := store.Resolve(ctx, rule.Freeze.EncoderTag.Repository, rule.Freeze.EncoderTag.Tag); err == nil {
		encTag = d.Digest.String()
	}
	cfg := FromRule(rule, encTag)
	if cfg.Budget.P50ms == nil || cfg.Budget.P99ms == nil || cfg.Budget.MaxRatio == nil || cfg.Budget.MaxLoadBytes == nil {
		t.Fatalf("the demo policy should set every budget limit: %+v", cfg.Budget)
	}
	cfg.Holdout.Enabled, cfg.Contract.Enabled = false, false // the budget is under test
	c, _ := registry.ParseRef("promo-scorer:cand-better", false)
	tg, _ := registry.ParseRef("promo-scorer:prod", false)
	var first *CheckResult
	loads := map[float64]int{}
	for i := 0; i < 10; i++ {
		rep, err := Run(ctx, Gate{Store: store, Candidate: c, Target: tg, Config: cfg,
			Policy: Policy{Name: pol.Name, Source: "promo-scorer.yaml", Digest: pol.Digest()}})
		if err != nil {
			t.Fatal(err)
		}
		var b *CheckResult
		for k := range rep.Checks {
			if rep.Checks[k].Name == CheckBudget {
				b = &rep.Checks[k]
			}
		}
		if b == nil || b.Budget == nil || b.Budget.Latency == nil {
			t.Fatalf("run %d: no budget detail", i)
		}
		for _, it := range b.Budget.Items {
			if it.Name == "load-memory" {
				loads[it.Value]++
			}
		}
		t.Logf("run %d: %s %s", i, b.Status, b.Summary)
		if first == nil {
			first = b
			continue
		}
		if b.Status != first.Status || len(b.Budget.Items) != len(first.Budget.Items) {
			t.Fatalf("run %d: budget %s with %d items; run 0: %s with %d", i, b.Status, len(b.Budget.Items), first.Status, len(first.Budget.Items))
		}
		for k, it := range b.Budget.Items {
			if f := first.Budget.Items[k]; it.Name != f.Name || it.Status != f.Status {
				t.Errorf("run %d: %s %s (%g); run 0: %s %s (%g)", i, it.Name, it.Status, it.Value, f.Name, f.Status, f.Value)
			}
		}
	}
	if first.Status != StatusPass {
		t.Errorf("the better candidate's budget: %s (%s)", first.Status, first.Summary)
	}
	// The count may differ by what another goroutine of the test binary
	// allocates in the window (a few bytes seen); a heap sample moved by
	// megabytes.
	lo, hi := 0.0, 0.0
	for v := range loads {
		if lo == 0 || v < lo {
			lo = v
		}
		hi = max(hi, v)
	}
	if hi-lo > 1024 {
		t.Errorf("load memory over ten gates: %v (bytes: count), spread %.0f bytes", loads, hi-lo)
	}
}
