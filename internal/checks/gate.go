package checks

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/score"
	"github.com/modelgate/modelgate/internal/version"
)

// Config is everything the checks need from a policy rule, with the
// policy's defaults applied. The integrity check always runs.
type Config struct {
	// Kind the target tag accepts: encoder or scorer.
	Kind     string
	Freeze   FreezeConfig
	Contract ContractConfig
	Holdout  HoldoutConfig
	Budget   BudgetConfig
}

// Event reports progress of a long phase.
type Event struct {
	Phase string // "load", "contract", "holdout", "budget"
	Done  int64
	Total int64 // -1 when unknown
}

// Gate is one gate run: a candidate asking to go to a target tag.
type Gate struct {
	Store     registry.Store
	Candidate registry.Ref
	// Target is the NAME:TAG the candidate asks to go to; what it points at
	// now is the baseline (none on a first release).
	Target registry.Ref
	// Holdout names the holdout artifact (nil when the policy names none).
	Holdout *registry.Ref
	Policy  Policy
	Config  Config
	// Progress receives events of long phases; nil means none.
	Progress func(Event)
	// Now stamps the report (default time.Now).
	Now func() time.Time
	// Shards, when not empty, are the holdout shard results to merge
	// instead of scoring the holdout here (see RunShard).
	Shards []*ShardResult
}

// Run runs every check and returns the report. An error means the gate
// could not run at all (bad input, unreadable store); a failing check is
// a report with verdict fail, not an error.
func Run(ctx context.Context, g Gate) (*Report, error) {
	now := time.Now
	if g.Now != nil {
		now = g.Now
	}
	if g.Target.Tag == "" || g.Target.HasDigest() {
		return nil, errkind.New(errkind.BadInput, "the target must be NAME:TAG, got %q", g.Target)
	}
	rep := &Report{SchemaVersion: 1, Tool: Tool{Name: "modelgate", Version: version.Version},
		Created: now().UTC().Format(time.RFC3339), Target: g.Target.String(), Policy: g.Policy}
	emit := func(e Event) {
		if g.Progress != nil {
			g.Progress(e)
		}
	}

	// Resolve the candidate and the baseline.
	candDesc, err := artifact.Resolve(ctx, g.Store, g.Candidate)
	if err != nil {
		return nil, fmt.Errorf("candidate %s: %w", g.Candidate, err)
	}
	candRef := registry.Ref{Repository: g.Candidate.Repository, Digest: candDesc.Digest}
	rep.Candidate = Subject{Ref: g.Candidate.String(), Digest: candDesc.Digest.String()}
	var baseRef *registry.Ref
	if bd, err := g.Store.Resolve(ctx, g.Target.Repository, g.Target.Tag); err == nil {
		baseRef = &registry.Ref{Repository: g.Target.Repository, Tag: g.Target.Tag, Digest: bd.Digest}
		rep.Baseline = &Subject{Ref: g.Target.String(), Digest: bd.Digest.String()}
	} else if !errors.Is(err, registry.ErrNotFound) {
		return nil, fmt.Errorf("resolving the target %s: %w", g.Target, err)
	}

	// 1. integrity: load (every blob re-hashed), spec, tensors, encoder.
	emit(Event{Phase: "load"})
	start := time.Now()
	integ := CheckResult{Name: CheckIntegrity}
	var cand *score.Model
	candLM, err := loadModel(ctx, g.Store, candRef)
	if err == nil {
		cand = candLM.model
	}
	if err != nil {
		if !errkind.Is(err, errkind.Integrity) {
			return nil, err
		}
		integ.Findings = append(integ.Findings, Finding{Status: StatusFail, Code: "integrity.candidate", Where: rep.Candidate.Digest, Message: err.Error()})
	} else {
		rep.Candidate.Kind, rep.Candidate.Name = cand.Loaded.Spec.Kind, cand.Loaded.Spec.Name
		if g.Config.Kind != "" && cand.Loaded.Spec.Kind != g.Config.Kind {
			integ.Findings = append(integ.Findings, Finding{Status: StatusFail, Code: "integrity.kind",
				Message: fmt.Sprintf("the candidate is a %s; %s takes a %s", cand.Loaded.Spec.Kind, g.Target, g.Config.Kind)})
		}
	}
	if g.Candidate.Repository != g.Target.Repository {
		integ.Findings = append(integ.Findings, Finding{Status: StatusFail, Code: "integrity.repository",
			Message: fmt.Sprintf("the candidate is in repository %s but the target tag is in %s: push or copy it there first", g.Candidate.Repository, g.Target.Repository)})
	}
	var base *score.Model
	var baseLM *loadedModel
	if baseRef != nil {
		baseLM, err = loadModel(ctx, g.Store, registry.Ref{Repository: baseRef.Repository, Digest: baseRef.Digest})
		if err == nil {
			base = baseLM.model
		}
		if err != nil {
			if !errkind.Is(err, errkind.Integrity) {
				return nil, err
			}
			integ.Findings = append(integ.Findings, Finding{Status: StatusFail, Code: "integrity.baseline", Where: rep.Baseline.Digest,
				Message: "the baseline cannot be compared: " + err.Error()})
			base, baseLM = nil, nil
		} else {
			rep.Baseline.Kind, rep.Baseline.Name = base.Loaded.Spec.Kind, base.Loaded.Spec.Name
		}
	}
	var hold *artifact.Holdout
	if g.Holdout != nil {
		hold, err = artifact.FetchHoldout(ctx, g.Store, *g.Holdout)
		if err == nil && len(g.Shards) == 0 && g.Config.Holdout.Enabled {
			// Every row will be read: fetch and verify the data first
			// (the merge of shard results reads none of it).
			if err = hold.Fetch(); err != nil {
				hold.Close()
			}
		}
		if err != nil {
			if !errkind.Is(err, errkind.Integrity) {
				return nil, fmt.Errorf("holdout %s: %w", g.Holdout, err)
			}
			integ.Findings = append(integ.Findings, Finding{Status: StatusFail, Code: "integrity.holdout", Message: err.Error()})
		} else {
			defer hold.Close()
			rep.Holdout = &Subject{Ref: g.Holdout.String(), Digest: hold.Artifact.Desc.Digest.String(), Kind: "holdout", Rows: hold.Info.Rows}
			if cand != nil && g.Config.Holdout.Enabled {
				if err := needLabels(cand, hold, *g.Holdout); err != nil {
					return nil, err
				}
				if err := needUniqueRowIDs(hold, g.Config.Holdout); err != nil {
					return nil, err
				}
			}
		}
	}
	var merged *holdoutState
	if len(g.Shards) > 0 && hold != nil && g.Config.Holdout.Enabled {
		// An incomplete or mismatched set of shard results is missing
		// input (exit 2), not a failed gate: refuse before any check runs
		// or any report exists.
		base := ""
		if rep.Baseline != nil {
			base = rep.Baseline.Digest
		}
		if merged, err = mergeShards(g.Shards, rep.Candidate.Digest, base, hold.Artifact.Desc.Digest.String(), rep.Policy.Digest, hold.Info.Rows); err != nil {
			return nil, fmt.Errorf("--merge: %w", err)
		}
	}
	finish(&integ)
	integ.Seconds = time.Since(start).Seconds()
	if integ.Status == StatusPass {
		integ.Summary = "every blob re-hashed; spec, tensors and encoder reference valid"
		if len(g.Shards) > 0 && hold != nil {
			integ.Summary = "every blob re-hashed but the holdout's data, which the shards read (each part checked against the holdout's block digests, or the whole blob against its digest); spec, tensors and encoder reference valid"
		}
		if cand != nil && cand.Loaded.Encoder != nil {
			integ.Summary += "; encoder " + cand.Loaded.Spec.Encoder.Digest + " present"
		}
	} else {
		integ.Summary = firstFail(integ.Findings)
	}
	rep.Checks = append(rep.Checks, integ)
	if cand == nil {
		for _, name := range []string{CheckFreeze, CheckContract, CheckHoldout, CheckBudget} {
			rep.Checks = append(rep.Checks, CheckResult{Name: name, Status: StatusSkip, Summary: "not run: the candidate failed integrity"})
		}
		return conclude(rep), nil
	}

	run := func(name string, enabled bool, f func() CheckResult) {
		if !enabled {
			rep.Checks = append(rep.Checks, CheckResult{Name: name, Status: StatusSkip, Summary: "disabled by the policy"})
			return
		}
		emit(Event{Phase: name})
		t := time.Now()
		r := f()
		r.Seconds = time.Since(t).Seconds()
		rep.Checks = append(rep.Checks, r)
	}
	run(CheckFreeze, g.Config.Freeze.Enabled, func() CheckResult { return Freeze(ctx, g.Store, cand.Loaded, g.Config.Freeze) })
	run(CheckContract, g.Config.Contract.Enabled, func() CheckResult { return contract(cand, g.Config.Contract) })
	run(CheckHoldout, g.Config.Holdout.Enabled, func() CheckResult {
		if hold == nil {
			return CheckResult{Name: CheckHoldout, Status: StatusFail, Summary: "no usable holdout",
				Findings: []Finding{{Status: StatusFail, Code: "holdout.missing", Message: "the policy enables the holdout check but names no usable holdout"}}}
		}
		if merged != nil {
			return mergedHoldout(merged, len(g.Shards), g.Config.Holdout)
		}
		return Holdout(ctx, cand, base, hold, g.Config.Holdout, func(done, total int64) { emit(Event{Phase: CheckHoldout, Done: done, Total: total}) })
	})
	run(CheckBudget, g.Config.Budget.Enabled, func() CheckResult { return budget(ctx, candLM, baseLM, g.Config.Budget) })
	return conclude(rep), nil
}

// needLabels refuses, as bad input (exit 2) rather than a failing check,
// a holdout without labels for a scorer, or with labels of one class: its
// log loss needs a label on every row, its AUC both classes, and the
// operator chose the holdout, not the candidate.
func needLabels(cand *score.Model, hold *artifact.Holdout, ref registry.Ref) error {
	if cand.Loaded.Spec.Kind != model.KindScorer {
		return nil
	}
	if !hold.Info.HasLabels {
		return errkind.New(errkind.BadInput, "holdout %s has no label column: the holdout check of a scorer needs a label (0 or 1) on every row; push a labelled holdout or disable the check in the policy", ref)
	}
	if p, n := hold.Info.Positives, hold.Info.Rows; p == 0 || p == n {
		label := 0
		if p == n {
			label = 1
		}
		return errkind.New(errkind.BadInput, "holdout %s has one class only (all %d rows are labelled %d): ROC AUC is undefined there and log loss cannot show whether a scorer ranks listeners; push a holdout with both labels", ref, n, label)
	}
	return nil
}

// conclude sets the verdict: fail when any check failed.
func conclude(rep *Report) *Report {
	rep.Verdict = VerdictPass
	rep.Reasons = []string{}
	for _, c := range rep.Checks {
		if c.Findings == nil {
			c.Findings = []Finding{}
		}
		if c.Status == StatusFail {
			rep.Verdict = VerdictFail
			rep.Reasons = append(rep.Reasons, c.Name+": "+c.Summary)
		}
	}
	for i := range rep.Checks {
		if rep.Checks[i].Findings == nil {
			rep.Checks[i].Findings = []Finding{}
		}
	}
	return rep
}

// mergedHoldout is the holdout check computed from the merged state of n
// shard results.
func mergedHoldout(st *holdoutState, n int, cfg HoldoutConfig) CheckResult {
	res := CheckResult{Name: CheckHoldout}
	var err error
	res.Holdout, err = finalize(st, cfg, &res)
	if err != nil {
		res.Findings = append(res.Findings, Finding{Status: StatusFail, Code: "holdout.error", Message: err.Error()})
		res.Status, res.Summary = StatusFail, err.Error()
		return res
	}
	res.Summary += fmt.Sprintf(" (merged from %d shards)", n)
	finish(&res)
	return res
}

// RunShard scores shard i (0-based) of n of the holdout — a contiguous
// range of rows — with the candidate and the baseline, and returns its
// sums for a later merge (Gate.Shards). Only the holdout pass runs; the
// merge step runs the other checks. The models and the holdout must load
// cleanly (an integrity problem is an error here).
func RunShard(ctx context.Context, g Gate, i, n int) (*ShardResult, error) {
	if n < 1 || i < 0 || i >= n {
		return nil, errkind.New(errkind.BadInput, "shard %d/%d: want 1 ≤ I ≤ N", i+1, n)
	}
	if g.Holdout == nil {
		return nil, errkind.New(errkind.BadInput, "the policy names no holdout: nothing to shard")
	}
	start := time.Now()
	candDesc, err := artifact.Resolve(ctx, g.Store, g.Candidate)
	if err != nil {
		return nil, fmt.Errorf("candidate %s: %w", g.Candidate, err)
	}
	r := &ShardResult{SchemaVersion: 1, Tool: Tool{Name: "modelgate", Version: version.Version}, Target: g.Target.String(),
		Candidate: candDesc.Digest.String(), Policy: g.Policy.Digest, Shard: i, Of: n}
	cand, err := loadPrepared(ctx, g.Store, registry.Ref{Repository: g.Candidate.Repository, Digest: candDesc.Digest})
	if err != nil {
		return nil, err
	}
	var base *score.Model
	if bd, err := g.Store.Resolve(ctx, g.Target.Repository, g.Target.Tag); err == nil {
		r.Baseline = bd.Digest.String()
		if base, err = loadPrepared(ctx, g.Store, registry.Ref{Repository: g.Target.Repository, Digest: bd.Digest}); err != nil {
			return nil, fmt.Errorf("baseline: %w", err)
		}
	} else if !errors.Is(err, registry.ErrNotFound) {
		return nil, err
	}
	hold, err := artifact.FetchHoldout(ctx, g.Store, *g.Holdout)
	if err != nil {
		return nil, err
	}
	defer hold.Close()
	if err := needLabels(cand, hold, *g.Holdout); err != nil {
		return nil, err
	}
	if err := needUniqueRowIDs(hold, g.Config.Holdout); err != nil {
		return nil, err
	}
	r.Holdout = hold.Artifact.Desc.Digest.String()
	r.FirstRow, r.EndRow = ShardRange(i, n, hold.Info.Rows)
	r.State, err = accumulate(ctx, cand, base, hold, g.Config.Holdout, r.FirstRow, r.EndRow, nil)
	if err != nil {
		return nil, err
	}
	r.Seconds = time.Since(start).Seconds()
	return r, nil
}

// loadPrepared loads and prepares a model (no footprint: shards do not
// run the budget).
func loadPrepared(ctx context.Context, store registry.Store, ref registry.Ref) (*score.Model, error) {
	l, err := artifact.Load(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	return score.Prepare(l)
}
