package policyscaffold

import (
	"context"
	"errors"
	"fmt"
	"math"
	"os"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// Statuses of a check finding.
const (
	StatusOK   = "ok"
	StatusWarn = "warn"
	StatusFail = "fail"
)

// Finding is one thing Check found about a rule.
type Finding struct {
	Status  string `json:"status"`
	Message string `json:"message"`
}

// RuleReport is what Check says about one rule.
type RuleReport struct {
	Target   string    `json:"target"`
	Kind     string    `json:"kind"`
	Findings []Finding `json:"findings"`
	Settings []Setting `json:"settings"`
}

// CheckReport is what Check says about a policy.
type CheckReport struct {
	Policy string       `json:"policy"`
	Name   string       `json:"name"`
	Digest string       `json:"digest"`
	Rules  []RuleReport `json:"rules"`
	// Retention says what the policy's retention section lets reclaim
	// remove, one finding per setting; a repository pattern that matches
	// none of the store's repositories warns.
	Retention []Finding `json:"retention"`
	// Failed counts the findings of status fail over every rule.
	Failed int `json:"failed"`
	Warned int `json:"warned"`
}

// Check reads the policy at path (schema, references and key files: a
// policy that does not load is a BadInput error listing every problem),
// then, for every rule (or only target's when not empty), checks it
// against the store without gating: the target's current model is of the
// rule's kind, the holdout exists, is a holdout and (scorers) has labels,
// the encoder tag exists, the thresholds are coherent (no limit a model
// that predicts the base rate passes, a baseline that fits its own
// budget, approvals that can be given), and lists every setting's
// effective value beside its default.
func Check(ctx context.Context, store registry.Store, path, target string) (*CheckReport, error) {
	p, err := policy.Load(path)
	if err != nil {
		return nil, err
	}
	raw, err := os.ReadFile(path)
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "%s: %v", path, err)
	}
	doc, err := policyJSON(path, raw)
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "%s: %v", path, err)
	}
	wireRules, _ := doc["rules"].([]any)
	rep := &CheckReport{Policy: path, Name: p.Name, Digest: p.Digest()}
	matched := false
	for i := range p.Rules {
		r := &p.Rules[i]
		if target != "" {
			if t, err := p.Rule(target); err != nil {
				return nil, err
			} else if t != r {
				continue
			}
		}
		matched = true
		rr := RuleReport{Target: r.Target.String(), Kind: r.Kind}
		add := func(status, format string, args ...any) {
			rr.Findings = append(rr.Findings, Finding{status, fmt.Sprintf(format, args...)})
			switch status {
			case StatusFail:
				rep.Failed++
			case StatusWarn:
				rep.Warned++
			}
		}
		checkRule(ctx, store, r, add)
		var wire map[string]any
		if i < len(wireRules) {
			wire, _ = wireRules[i].(map[string]any)
		}
		if rr.Settings, err = Effective(wire, r.Kind); err != nil {
			return nil, err
		}
		rep.Rules = append(rep.Rules, rr)
	}
	if !matched {
		return nil, errkind.New(errkind.BadInput, "policy %s has no rule for %s", path, target)
	}
	rep.Retention = checkRetention(ctx, store, p.Retention, func() { rep.Warned++ })
	return rep, nil
}

// checkRetention describes a retention section as findings.
func checkRetention(ctx context.Context, store registry.Store, r *policy.Retention, warned func()) []Finding {
	if r == nil {
		return []Finding{{StatusOK, "no retention section: reclaim finds nothing eligible under this policy"}}
	}
	out := []Finding{{StatusOK, fmt.Sprintf("grace period %s: nothing younger is eligible", r.Grace)}}
	repos, err := store.Repositories(ctx)
	for i := range r.Repositories {
		rr := &r.Repositories[i]
		msg := fmt.Sprintf("repository %s: keeps the newest %d candidates nothing else keeps", rr.Pattern, rr.KeepCandidates)
		if len(rr.ExpireTags) == 0 {
			msg += "; no tag expires"
		}
		for _, e := range rr.ExpireTags {
			msg += fmt.Sprintf("; tags %s expire after %s", e.Pattern, e.After)
		}
		out = append(out, Finding{StatusOK, msg})
		if err != nil {
			continue // a registry without a catalog: nothing to compare with
		}
		matches := false
		for _, repo := range repos {
			if r.For(repo) == rr {
				matches = true
			}
		}
		if !matches {
			out = append(out, Finding{StatusWarn, fmt.Sprintf("retention entry %s applies to none of the store's repositories (an earlier entry may match them first)", rr.Pattern)})
			warned()
		}
	}
	return out
}

func checkRule(ctx context.Context, store registry.Store, r *policy.Rule, add func(status, format string, args ...any)) {
	// The target and what it serves now.
	var base *artifact.Loaded
	switch d, err := store.Resolve(ctx, r.Target.Repository, r.Target.Tag); {
	case errors.Is(err, registry.ErrNotFound):
		add(StatusOK, "%s points at nothing yet: the first release is judged by the absolute limits", r.Target)
	case err != nil:
		add(StatusFail, "%s: %v", r.Target, err)
	default:
		l, err := artifact.Load(ctx, store, registry.Ref{Repository: r.Target.Repository, Digest: d.Digest})
		switch {
		case err != nil:
			add(StatusFail, "%s (%s): %v", r.Target, d.Digest, err)
		case l.Spec == nil:
			add(StatusFail, "%s (%s) is not a model the gate can read", r.Target, d.Digest)
		case l.Spec.Kind != r.Kind:
			add(StatusFail, "%s serves a %s, the rule says kind %s", r.Target, l.Spec.Kind, r.Kind)
		default:
			base = l
			add(StatusOK, "%s serves %s (%s), the baseline", r.Target, d.Digest, l.Spec.Kind)
		}
	}

	// The holdout.
	if r.Holdout.Enabled && r.HoldoutRef != nil {
		info, err := holdoutInfo(ctx, store, *r.HoldoutRef)
		switch {
		case errors.Is(err, registry.ErrNotFound):
			add(StatusFail, "holdout %s is not in the store: push it with push --kind holdout", r.HoldoutRef)
		case err != nil:
			add(StatusFail, "holdout %s: %v", r.HoldoutRef, err)
		case r.Kind == policy.KindScorer && !info.HasLabels:
			add(StatusFail, "holdout %s has no labels: a scorer's log loss needs them", r.HoldoutRef)
		default:
			add(StatusOK, "holdout %s: %d rows%s", r.HoldoutRef, info.Rows, map[bool]string{true: ", labelled", false: ""}[info.HasLabels])
			if r.Kind == policy.KindScorer && r.Holdout.Slices.MinRows > 0 && info.Rows < int64(r.Holdout.Slices.MinRows) {
				add(StatusWarn, "the holdout has %d rows, fewer than slices.minRows %d: no slice can be judged", info.Rows, r.Holdout.Slices.MinRows)
			}
		}
	}

	// The encoder tag of a scorer.
	if et := r.Freeze.EncoderTag; r.Freeze.Enabled && et != nil {
		if _, err := store.Resolve(ctx, et.Repository, et.Tag); errors.Is(err, registry.ErrNotFound) {
			add(StatusFail, "freeze.encoderTag %s does not exist: every scorer would fail the freeze check", et)
		} else if err != nil {
			add(StatusFail, "freeze.encoderTag %s: %v", et, err)
		} else if base != nil && base.Spec.Encoder != nil {
			if d, _ := store.Resolve(ctx, et.Repository, et.Tag); d.Digest.String() != base.Spec.Encoder.Digest {
				add(StatusWarn, "freeze.encoderTag %s points at %s, not at the baseline's encoder %s", et, d.Digest, base.Spec.Encoder.Digest)
			}
		}
	}

	// Thresholds that make sense together.
	h := r.Holdout
	if r.Kind == policy.KindScorer && h.Enabled {
		if h.MinAUC != nil && *h.MinAUC < 0.5 {
			add(StatusWarn, "holdout.minAUC %g is below 0.5: a model ranking worse than chance passes a first release", *h.MinAUC)
		}
		if h.MaxNormalizedEntropy != nil && *h.MaxNormalizedEntropy > 1 {
			add(StatusWarn, "holdout.maxNormalizedEntropy %g is above 1: a model worse than predicting the base rate passes a first release", *h.MaxNormalizedEntropy)
		}
		if h.MaxLogLoss != nil && *h.MaxLogLoss > math.Ln2 {
			add(StatusWarn, "holdout.maxLogLoss %g nats is above ln 2 = %.4f, the loss of predicting 0.5 for every row", *h.MaxLogLoss, math.Ln2)
		}
		if h.MaxECE != nil && *h.MaxECE >= 0.5 {
			add(StatusWarn, "holdout.maxECE %g: no calibration limit in practice", *h.MaxECE)
		}
		if h.Slices.PerSliceMargin < h.Margin {
			add(StatusWarn, "holdout.slices.perSliceMargin %g is below the overall margin %g: slices are smaller and noisier than the whole", h.Slices.PerSliceMargin, h.Margin)
		}
	}
	if h.Enabled && h.Margin > 0.05 {
		add(StatusWarn, "holdout.margin %g nats per row lets a candidate lose a lot against the baseline", h.Margin)
	}
	if b := r.Budget; b.Enabled && base != nil {
		fp := checks.Measure(base)
		if b.MaxBytes != nil && fp.Bytes > *b.MaxBytes {
			add(StatusFail, "budget.maxBytes %d: the baseline itself measures %d bytes", *b.MaxBytes, fp.Bytes)
		}
		if b.MaxParams != nil && fp.Params > *b.MaxParams {
			add(StatusFail, "budget.maxParams %d: the baseline itself has %d parameters", *b.MaxParams, fp.Params)
		}
	}
	if b := r.Budget; b.Enabled && b.MaxBytes == nil && b.MaxParams == nil && b.MaxLoadBytes == nil && b.Latency == nil {
		add(StatusWarn, "the budget check sets no limit: it measures and passes everything")
	}
	if a := r.Approvals; a.Required == 0 {
		add(StatusWarn, "approvals.required is 0: promote needs no one's approval")
	} else if a.Required > len(a.Approvers) {
		add(StatusFail, "approvals.required %d with %d approvers listed", a.Required, len(a.Approvers))
	}
}
