package release

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"sort"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// Refusal is why promote, approve or rollback refused: every problem
// found, one line each, with the reports and approvals it judged. It is
// returned wrapped in its errkind (Kind).
type Refusal struct {
	Kind      errkind.Kind
	Action    string
	Problems  []string
	Reports   []ReportCheck
	Approvals []ApprovalCheck
}

func (r *Refusal) Error() string {
	if len(r.Problems) == 1 {
		return r.Action + " refused: " + r.Problems[0]
	}
	return fmt.Sprintf("%s refused (%d problems):\n  - %s", r.Action, len(r.Problems), strings.Join(r.Problems, "\n  - "))
}

// refuse returns r wrapped in its kind.
func refuse(r *Refusal) error { return errkind.Wrap(r.Kind, r) }

// PromoteRequest is what Promote needs.
type PromoteRequest struct {
	// Candidate is the candidate's manifest digest in Target's repository.
	Candidate v1.Hash
	// Target is the tag to move.
	Target registry.Ref
	// Policy is a policy from a file; nil judges by the policy bound to
	// Target. When Target has a bound policy, Policy must be that policy
	// (else the promotion is refused, naming what differs); when Target has
	// no release log, Policy is required and the promotion binds it.
	Policy *policy.Policy
	// Policies are further policies consulted for the coupling of encoders
	// and scorers: their scorer rules whose freeze.encoderTag is Target
	// name scorer tags that consume Target's encoder (besides those found
	// by reverse lineage).
	Policies []*policy.Policy
	// CandidateName is how the caller named the candidate (NAME:TAG), for
	// messages; "" names it by digest.
	CandidateName string
	// Key signs the release record; nil writes an unsigned record whose
	// author is User.
	Key *Key
	// User names who promotes when Key is nil.
	User string
	// Reason is optional free text.
	Reason string
	// Now is the time of the promotion; zero means time.Now.
	Now time.Time
}

// PromoteResult is what Promote did.
type PromoteResult struct {
	// NoOp is true when the candidate already was the tag's target.
	NoOp   bool   `json:"noOp"`
	Target string `json:"target"`
	From   string `json:"from,omitempty"`
	To     string `json:"to"`
	// Record is the new release record's digest.
	Record    string          `json:"record,omitempty"`
	Report    string          `json:"gateReport,omitempty"`
	Reports   []ReportCheck   `json:"reports,omitempty"`
	Approvals []ApprovalCheck `json:"approvals,omitempty"`
	Required  int             `json:"required"`
	// Completed names a pending record (an interrupted release) that was
	// completed first.
	Completed string `json:"completed,omitempty"`
}

// Judge is the verdict on a candidate for a target under a policy, as
// promote would reach it now, without moving anything.
type Judge struct {
	Reports   []ReportCheck
	Report    *ReportCheck // the newest usable report, nil when none
	Approvals []ApprovalCheck
	Counted   int
	Required  int
	Problems  []string
	Kind      errkind.Kind // 0 when there is no problem
	// Ended are the rollbacks that took the tag away from this candidate,
	// ending its earlier gate reports and approvals, oldest first.
	Ended []EndedRelease
}

// judgeMode says how far judge goes.
type judgeMode int

const (
	judgeReports  judgeMode = iota // gate reports only (approve)
	judgePromote                   // reports and approvals, for a promotion by promoter
	judgeStanding                  // reports and approvals so far, whoever promotes
)

// promoterID is who signs a promotion: the key id and the names the
// policy gives that key ("" and none when unsigned).
type promoterID struct {
	id    string
	names map[string]bool
}

// judge checks the gate reports and approvals of cand for the rule of
// target against baseline ("" when the tag is absent).
func judge(ctx context.Context, store registry.Store, cand string, target registry.Ref, pol *policy.Policy, baseline string, promoter promoterID, now time.Time, mode judgeMode) (*Judge, error) {
	rule, err := pol.Rule(target.String())
	if err != nil {
		return nil, err
	}
	approvers, err := TrustedKeys(rule.Approvals.Approvers)
	if err != nil {
		return nil, err
	}
	signers, err := TrustedKeys(rule.Approvals.ReportSigners)
	if err != nil {
		return nil, err
	}
	holdout := ""
	if h := rule.HoldoutRef; h != nil {
		if h.HasDigest() {
			holdout = h.Digest.String()
		} else {
			d, err := store.Resolve(ctx, h.Repository, h.Tag)
			if err != nil {
				return nil, fmt.Errorf("resolving the policy's holdout %s: %w", h, err)
			}
			holdout = d.Digest.String()
		}
	}
	repo := target.Repository
	j := &Judge{Required: rule.Approvals.Required}
	j.Reports, err = checkReports(ctx, store, repo, Binding{Candidate: cand, Target: target.String(), Baseline: baseline,
		Holdout: holdout, Policy: pol.Digest(), Tool: toolVersion(), Signers: signers})
	if err != nil {
		return nil, err
	}
	ended, err := endedFor(ctx, store, repo, cand, target.String())
	if err != nil {
		return nil, err
	}
	j.Ended = ended.rollbacks
	for i := range j.Reports {
		if why, ok := ended.digests[j.Reports[i].Digest]; ok {
			r := &j.Reports[i]
			r.Usable, r.otherBaseline, r.failed = false, false, false
			r.Why = strings.TrimPrefix(r.Why+"; "+why, "; ")
		}
	}
	usable := map[string]bool{}
	var other, failed, damaged bool
	for i := range j.Reports {
		r := &j.Reports[i]
		if r.Usable {
			usable[r.Digest] = true
			if j.Report == nil {
				j.Report = r
			}
		}
		other = other || r.otherBaseline
		failed = failed || r.failed
		damaged = damaged || r.integrity
	}
	fail := func(k errkind.Kind, format string, args ...any) {
		j.Problems = append(j.Problems, fmt.Sprintf(format, args...))
		if j.Kind == 0 || rank(k) > rank(j.Kind) {
			j.Kind = k
		}
	}
	if j.Report == nil {
		for _, r := range j.Reports {
			j.Problems = append(j.Problems, fmt.Sprintf("gate report %s (%s): %s", shortHex(r.Digest), r.Created, r.Why))
		}
		switch {
		case damaged:
			fail(errkind.Integrity, "a gate report of this candidate is damaged in the store")
		case len(j.Ended) > 0 && len(j.Reports) > 0 && allEnded(j.Reports, ended):
			e := j.Ended[len(j.Ended)-1]
			fail(errkind.Unauthorized, "%s was rolled back from %s (%s, by %s: %q): the gate reports and approvals of that release no longer count; gate and approve it again", shortHex(cand), target, e.Time, e.By, e.Reason)
		case other:
			fail(errkind.Conflict, "the only gate reports bound to this candidate, policy and holdout were made against another baseline: %s now points at %s; gate again", target, orNone(baseline))
		case failed:
			fail(errkind.GateFailed, "the gate failed for this candidate against baseline %s", orNone(baseline))
		case len(j.Reports) == 0:
			fail(errkind.Unauthorized, "no gate report for this candidate: run `modelgate gate` first")
		default:
			fail(errkind.Unauthorized, "no passing gate report bound to this candidate, baseline %s, holdout %s, policy %s and modelgate %s", orNone(baseline), orNone(holdout), shortHex(pol.Digest()), toolVersion())
		}
	}
	if mode == judgeReports || rule.Approvals.Required == 0 {
		return j, nil
	}
	if mode == judgePromote && promoter.id == "" && !rule.Approvals.AllowSelfApproval {
		fail(errkind.Unauthorized, "the policy forbids self-approval, so promote must know who promotes: sign with --key")
	}
	if mode == judgePromote && promoter.id != "" && len(promoter.names) == 0 && !rule.Approvals.AllowSelfApproval {
		fail(errkind.Unauthorized, "the policy forbids self-approval, so whoever promotes must sign with a key the policy lists (under releasers.promote or approvals.approvers): key %s is not listed, so the policy cannot tell whose approval is their own", promoter.id)
	}
	j.Approvals, j.Counted, err = checkApprovals(ctx, store, repo, approvalContext{candidate: cand, target: target.String(),
		policy: pol.Digest(), reports: usable, approvers: approvers, maxAge: rule.Approvals.MaxAge, now: now,
		promoter: promoter.id, promoterNames: promoter.names, allowSelf: rule.Approvals.AllowSelfApproval, ended: ended.digests})
	if err != nil {
		return nil, err
	}
	if j.Counted < rule.Approvals.Required {
		damaged := false
		for _, a := range j.Approvals {
			if !a.Counted {
				j.Problems = append(j.Problems, fmt.Sprintf("approval %s by %s does not count: %s", shortHex(a.Digest), a.Approver, a.Why))
			}
			damaged = damaged || a.integrity
		}
		if damaged {
			fail(errkind.Integrity, "an approval of this candidate is damaged in the store")
		}
		fail(errkind.Unauthorized, "%d of the %d approvals the policy requires (from distinct trusted keys; %d stored approval(s) judged)%s", j.Counted, rule.Approvals.Required, len(j.Approvals), whoCanApprove(j.Approvals, approvers, promoter, rule.Approvals.AllowSelfApproval))
	}
	return j, nil
}

// addProblems puts ps before the problems the judge found, raising its
// kind where one is graver.
func (j *Judge) addProblems(ps []problem) {
	var lines []string
	for _, p := range ps {
		lines = append(lines, p.text)
		if j.Kind == 0 || rank(p.kind) > rank(j.Kind) {
			j.Kind = p.kind
		}
	}
	j.Problems = append(lines, j.Problems...)
}

// rank orders problem kinds: the most specific cause decides the exit code.
func rank(k errkind.Kind) int {
	switch k {
	case errkind.Integrity:
		return 4
	case errkind.Conflict:
		return 3
	case errkind.GateFailed:
		return 2
	case errkind.Unauthorized:
		return 1
	}
	return 0
}

// Promote moves req.Target to req.Candidate if everything the policy asks
// holds (see the package doc for the order of writes), writing a release
// record. A refusal is a *Refusal wrapped in its kind: Conflict when the
// tag moved (the gate report was for another baseline, or a race was
// lost), GateFailed when the gate failed, Unauthorized when a report
// signature or approvals are missing, Integrity when the release log
// disagrees with the tag.
func Promote(ctx context.Context, store registry.Store, req PromoteRequest) (*PromoteResult, error) {
	t := req.Target
	if err := checkTarget(t); err != nil {
		return nil, err
	}
	sw, err := swapper(store)
	if err != nil {
		return nil, err
	}
	repo := t.Repository
	candDesc, err := subjectOf(ctx, store, repo, req.Candidate)
	if err != nil {
		return nil, fmt.Errorf("the candidate %s (it must be in repository %s): %w", req.Candidate, repo, err)
	}
	s, completed, err := settledState(ctx, store, sw, t, false)
	if err != nil {
		return nil, err
	}
	res := &PromoteResult{Target: t.String(), From: s.current(), To: req.Candidate.String(), Completed: completed}
	if s.external {
		return res, refuse(&Refusal{Kind: errkind.Integrity, Action: "promote", Problems: []string{fmt.Sprintf(
			"%s points at %s but its newest release record says %s: the tag was moved outside modelgate. Inspect with `modelgate log %s`, then `modelgate rollback %s` restores the last released model", t, orNone(s.current()), s.head.Record.To, t, t)}})
	}
	if s.current() == req.Candidate.String() {
		res.NoOp = true
		return res, nil
	}
	bound, err := boundOf(ctx, store, s)
	if err != nil {
		return nil, err
	}
	if bound.Legacy {
		return res, refuse(&Refusal{Kind: errkind.Unauthorized, Action: "promote", Problems: []string{fmt.Sprintf(
			"%s has a release log from before policies were bound to tags: bind its policy first with `modelgate policy bind %s --policy FILE --key KEY` (see the README: the policy its last promotion was judged under)", t, t)}})
	}
	pol, err := choosePolicy(bound, t, req.Policy, "promote")
	if err != nil {
		return res, err
	}
	rule, err := pol.Rule(t.String())
	if err != nil {
		return nil, err
	}
	if msg := releaserCheck(rule, KindPromote, req.Key); msg != "" {
		return res, refuse(&Refusal{Kind: errkind.Unauthorized, Action: "promote", Problems: []string{msg}})
	}
	now := nowUTC(req.Now)
	var promoter promoterID
	if req.Key != nil {
		promoter.id = req.Key.ID
		promoter.names, _ = promoterIdentity(rule, req.Key.Public)
	}
	mv, err := newMove(ctx, store, t, req.Candidate, req.CandidateName, s.current(), pol)
	if err != nil {
		return nil, err
	}
	coupling, err := couplingProblems(ctx, store, []move{mv}, append([]*policy.Policy{pol}, req.Policies...))
	if err != nil {
		return nil, err
	}
	j, err := judge(ctx, store, req.Candidate.String(), t, pol, s.current(), promoter, now, judgePromote)
	if err != nil {
		return nil, err
	}
	j.addProblems(coupling)
	res.Reports, res.Approvals, res.Required = j.Reports, j.Approvals, j.Required
	if len(j.Problems) > 0 {
		return res, refuse(&Refusal{Kind: j.Kind, Action: "promote", Problems: j.Problems, Reports: j.Reports, Approvals: j.Approvals})
	}
	res.Report = j.Report.Digest
	var approvals []string
	for _, a := range j.Approvals {
		if a.Counted {
			approvals = append(approvals, a.Digest)
		}
	}
	sort.Strings(approvals)
	rec := &Record{Kind: KindPromote, Target: t.String(), From: s.current(), To: req.Candidate.String(), Report: j.Report.Digest,
		Approvals: approvals, PolicyDigest: pol.Digest(), Policy: pol.Digest(), Reason: req.Reason, By: whoUnsigned(req.User),
		Time: now.Format(time.RFC3339)}
	var polBlob artifact.Blob
	if bound.Policy != nil {
		polBlob = artifact.Blob{Desc: *s.head.policy}
	} else {
		// The first release binds the policy: store it as an artifact of
		// its own too, about the model it first released.
		polBlob = policyBlob(pol)
		// Racing first releases store the same policy artifact at once; a
		// registry may fail one of several concurrent uploads of the same
		// blob (docker-registry answers DIGEST_INVALID), so the write,
		// which is content-addressed and idempotent, is tried again.
		var err error
		for attempt := 1; ; attempt++ {
			if _, err = StorePolicy(ctx, store, repo, pol, req.Candidate, t.String()); err == nil || attempt == 4 || ctx.Err() != nil {
				break
			}
			time.Sleep(time.Duration(attempt*attempt) * 50 * time.Millisecond)
		}
		if err != nil {
			return nil, fmt.Errorf("storing the policy: %w", err)
		}
	}
	var released []string
	if s.head != nil {
		rec.Previous = s.head.Digest.String()
		rec.Restore = &Restore{Target: s.current(), Record: s.head.Digest.String()}
		if released, err = s.head.releasedList(ctx, store, repo); err != nil {
			return nil, err
		}
	} else if s.current() != "" {
		// The tag existed before its first record: adopt its target.
		rec.Restore = &Restore{Target: s.current()}
		released = []string{s.current()}
	}
	released = appendNew(released, rec.To)
	recDesc, err := writeRecord(ctx, store, repo, rec, released, nil, req.Key, &polBlob)
	if err != nil {
		return nil, fmt.Errorf("writing the release record: %w", err)
	}
	res.Record = recDesc.Digest.String()
	if err := noteConsumer(ctx, store, t, rec.To, rule); err != nil {
		return res, err
	}
	if err := commit(ctx, store, sw, s, recDesc, candDesc); err != nil {
		return res, err
	}
	return res, nil
}

// commit moves the model tag (the commit point), then the head pointer.
func commit(ctx context.Context, store registry.Store, sw registry.TagSwapper, s *state, recDesc, toDesc v1.Descriptor) error {
	t := s.target
	var old v1.Hash
	was := "(absent)"
	if s.tagDesc != nil {
		old, was = s.tagDesc.Digest, s.tagDesc.Digest.String()
	}
	if err := sw.SwapTag(ctx, t.Repository, t.Tag, old, toDesc); err != nil {
		if errors.Is(err, registry.ErrConflict) {
			now := "(absent)"
			if d, err := store.Resolve(ctx, t.Repository, t.Tag); err == nil {
				now = d.Digest.String()
			}
			return refuse(&Refusal{Kind: errkind.Conflict, Action: "release", Problems: []string{fmt.Sprintf(
				"%s moved from %s to %s while this ran (a concurrent promote or rollback won); nothing changed, the unused record %s is harmless", t, was, now, shortHex(recDesc.Digest.String()))}})
		}
		return fmt.Errorf("moving %s: %w", t, err)
	}
	if err := sw.SwapTag(ctx, t.Repository, s.headTag, s.headDigest(), recDesc); err != nil {
		if errors.Is(err, registry.ErrConflict) {
			d, rerr := store.Resolve(ctx, t.Repository, s.headTag)
			if rerr == nil && d.Digest == recDesc.Digest {
				return nil // another process completed our record for us
			}
			// Another record built on the same head won the head: a policy
			// record (which moves only the head pointer) or a release of
			// several tags that claimed this tag's head before moving it.
			// Put the tag back, so the log and the tag agree again (the
			// release then moves it from where its record says).
			if rerr == nil && s.tagDesc != nil {
				if lr, err := readRecord(ctx, store, t.Repository, d.Digest, t.String()); err == nil &&
					lr.Record.Previous == s.headDigest().String() && sw.SwapTag(ctx, t.Repository, t.Tag, toDesc.Digest, *s.tagDesc) == nil {
					why := fmt.Sprintf("the policy bound to %s changed while this ran (record %s); %s was put back to %s: try again under the new policy", t, shortHex(d.Digest.String()), t, was)
					if lr.Record.Kind != KindPolicy {
						why = fmt.Sprintf("a concurrent release (record %s, of %s) claimed the release log of %s while this ran; %s was put back to %s and that release goes on: nothing of this one changed, gate again against what %s points at then",
							shortHex(d.Digest.String()), strings.Join(lr.Record.UnitTargets(), ", "), t, t, was, t)
					}
					return refuse(&Refusal{Kind: errkind.Conflict, Action: "release", Problems: []string{why}})
				}
			}
			return errkind.New(errkind.Integrity, "%s now points at %s, but the release log head %s was moved by someone else before it could name record %s: run `modelgate log %s`", t, toDesc.Digest, s.headTag, recDesc.Digest, t)
		}
		return fmt.Errorf("%s moved, but advancing the release log head failed (the next promote or rollback completes it): %w", t, err)
	}
	return markCommitted(ctx, store, s, recDesc)
}

// markCommitted records, as a referrer of the release record, that this
// process saw its tag moves succeed, before it reports success. On a store
// without compare-and-swap (an OCI registry) a concurrent release can
// still overwrite both tags afterwards; the record then drops out of the
// chain while its marker stays, and `log` reports it as damage instead of
// a harmless unused record, so a release that was announced and then lost
// cannot go unnoticed.
func markCommitted(ctx context.Context, store registry.Store, s *state, recDesc v1.Descriptor) error {
	t := s.target
	body, err := json.Marshal(map[string]string{"record": recDesc.Digest.String(), "target": t.String(), "time": time.Now().UTC().Format(time.RFC3339Nano)})
	if err != nil {
		return err
	}
	layer := artifact.NewBlob(MediaTypeCommitted, body, map[string]string{artifact.AnnotationTitle: "committed.json"})
	if _, err := putArtifact(ctx, store, t.Repository, ArtifactTypeCommitted, []artifact.Blob{layer}, recDesc,
		map[string]string{AnnotationTarget: t.String()}); err != nil {
		return fmt.Errorf("%s moved, but recording that it did failed (run `modelgate log %s`): %w", t, t, err)
	}
	return nil
}

func appendNew(list []string, d string) []string {
	for _, x := range list {
		if x == d {
			return list
		}
	}
	return append(append([]string(nil), list...), d)
}

// currentTarget checks target and returns the digest it points at ("" when
// the tag does not exist yet).
func currentTarget(ctx context.Context, store registry.Store, target registry.Ref) (string, error) {
	if err := checkTarget(target); err != nil {
		return "", err
	}
	d, err := store.Resolve(ctx, target.Repository, target.Tag)
	if errors.Is(err, registry.ErrNotFound) {
		return "", nil
	}
	if err != nil {
		return "", err
	}
	return d.Digest.String(), nil
}

// Standing is where cand stands for target at now under the policy bound
// to target (pol when none is bound), judged by promote's own rules: its gate reports against what the tag points at
// now, and which stored approvals count (each key once). Who promotes is
// not known, so the self-approval rule is not applied: a read-only view
// shows this as "so far".
func Standing(ctx context.Context, store registry.Store, cand v1.Hash, target registry.Ref, pol *policy.Policy, now time.Time) (*Judge, error) {
	baseline, err := currentTarget(ctx, store, target)
	if err != nil {
		return nil, err
	}
	b, err := BoundPolicy(ctx, store, target)
	if err != nil {
		return nil, err
	}
	if b.Policy != nil {
		pol = b.Policy
	}
	if pol == nil {
		return nil, errkind.New(errkind.BadInput, "%s has no bound policy and none was given", target)
	}
	return judge(ctx, store, cand.String(), target, pol, baseline, promoterID{}, now, judgeStanding)
}

// ApproveCheck judges whether cand may be approved for target now under
// the policy bound to it (pol, from a file, must be that policy; it is
// used when none is bound): it needs a passing gate report bound to the tag's current target
// (approvals are not counted). It returns the newest usable report.
func ApproveCheck(ctx context.Context, store registry.Store, cand v1.Hash, target registry.Ref, pol *policy.Policy) (*ReportCheck, error) {
	baseline, err := currentTarget(ctx, store, target)
	if err != nil {
		return nil, err
	}
	if _, err := subjectOf(ctx, store, target.Repository, cand); err != nil {
		return nil, fmt.Errorf("the candidate %s (it must be in repository %s): %w", cand, target.Repository, err)
	}
	if baseline == cand.String() {
		return nil, errkind.New(errkind.BadInput, "%s already points at %s: nothing to approve", target, cand)
	}
	pol, _, err = PolicyFor(ctx, store, target, pol, "approve")
	if err != nil {
		return nil, err
	}
	j, err := judge(ctx, store, cand.String(), target, pol, baseline, promoterID{}, time.Now(), judgeReports)
	if err != nil {
		return nil, err
	}
	if len(j.Problems) > 0 {
		return nil, refuse(&Refusal{Kind: j.Kind, Action: "approve", Problems: j.Problems, Reports: j.Reports})
	}
	return j.Report, nil
}

// whoCanApprove says, for a refusal short of approvals, whose approvals
// counted and which approvers the policy lists could still approve: each
// listed key without a counted approval, leaving out the promoter's own
// keys when the policy forbids self-approval.
func whoCanApprove(checks []ApprovalCheck, approvers []PublicKey, promoter promoterID, allowSelf bool) string {
	counted := map[string]bool{}
	var by []string
	for _, a := range checks {
		if a.Counted {
			counted[a.Approver.KeyID] = true
			by = append(by, a.Approver.Name)
		}
	}
	var can []string
	seen := map[string]bool{}
	for _, k := range approvers {
		if counted[k.ID] || seen[k.ID] {
			continue
		}
		seen[k.ID] = true
		if !allowSelf && (k.ID == promoter.id || promoter.names[k.Name]) {
			continue
		}
		can = append(can, k.Name)
	}
	out := "; approved by: none"
	if len(by) > 0 {
		out = "; approved by: " + strings.Join(by, ", ")
	}
	if len(can) > 0 {
		return out + fmt.Sprintf("; can still approve (%d): ", len(can)) + strings.Join(can, ", ")
	}
	return out + "; no other approver the policy lists can approve"
}
