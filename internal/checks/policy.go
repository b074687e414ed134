package checks

import (
	"github.com/modelgate/modelgate/internal/policy"
)

// FromRule turns a policy rule (defaults applied) into the checks'
// configuration. encoderTagDigest is the current target of the rule's
// freeze.encoderTag ("" when the rule names none or the tag is missing).
func FromRule(r *policy.Rule, encoderTagDigest string) Config {
	c := Config{Kind: r.Kind}
	c.Freeze = FreezeConfig{Enabled: r.Freeze.Enabled, RequireFrozen: r.Freeze.RequireFrozen, EncoderTagDigest: encoderTagDigest}
	if r.Freeze.EncoderTag != nil {
		c.Freeze.EncoderTag = r.Freeze.EncoderTag.String()
	}
	ct := r.Contract
	c.Contract = ContractConfig{Enabled: ct.Enabled, ProbeAbs: ct.ProbeTolerance.Abs, ProbeRel: ct.ProbeTolerance.Rel,
		BatchTolerance: ct.BatchTolerance, PermutationTolerance: ct.PermutationTolerance.Abs,
		WeakProbesFail: ct.RequireDistinctValuesProbes, ExtraRows: ct.ExtraRows.Count, Seed: ct.ExtraRows.Seed}
	h := r.Holdout
	c.Holdout = HoldoutConfig{Enabled: h.Enabled, Margin: h.Margin, Confidence: h.Confidence, Replicas: h.BootstrapReplicas, Seed: h.Seed,
		NonzeroQuantiles: h.Slices.NonzeroQuantiles, AnomalyQuantile: h.Slices.AnomalyQuantile, AnomalyWeight: h.Slices.AnomalyWeight,
		FailOnSlice: h.Slices.FailOnSlice, MinSliceRows: h.Slices.MinRows, MaxLogLoss: h.MaxLogLoss, MaxNormalizedEntropy: h.MaxNormalizedEntropy, MinAUC: h.MinAUC,
		MaxECE: h.MaxECE, Alpha: h.Alpha, WeightQuantile: h.WeightQuantile, WeightPower: h.WeightPower, MaxReconstruction: h.MaxReconstructionLoss,
		ClusterColumn: h.ClusterColumn, TailExcess: h.Tail.Excess, TailAction: h.Tail.Action}
	if h.Slices.PerSliceMargin > 0 {
		c.Holdout.PerSliceMargin = ptr(h.Slices.PerSliceMargin)
	}
	if r.Kind == "scorer" && c.Holdout.AnomalyWeight == 0 && h.Slices.AnomalyQuantile == 0 {
		c.Holdout.AnomalyWeight = 1
	}
	b := r.Budget
	c.Budget = BudgetConfig{Enabled: b.Enabled, MaxGrowth: ptr(b.MaxGrowth)}
	if b.MaxBytes != nil {
		c.Budget.MaxBytes = ptr(float64(*b.MaxBytes))
	}
	if b.MaxParams != nil {
		c.Budget.MaxParams = ptr(float64(*b.MaxParams))
	}
	if b.MaxLoadBytes != nil {
		c.Budget.MaxLoadBytes = ptr(float64(*b.MaxLoadBytes))
	}
	if l := b.Latency; l != nil {
		c.Budget.Candidates, c.Budget.Runs, c.Budget.Blocks = l.Candidates, l.Runs, l.Blocks
		c.Budget.P50ms, c.Budget.P99ms, c.Budget.MaxRatio = l.P50Ms, l.P99Ms, l.MaxRatio
	}
	return c
}
