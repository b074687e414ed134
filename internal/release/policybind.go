package release

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// PredicatePolicyApproval is the predicate type of an approval of a
// change of a tag's bound policy.
const PredicatePolicyApproval = "https://modelgate.invalid/policy-approval/v1"

// ArtifactTypePolicyApproval is the artifact type of a policy-change
// approval; its subject is the release record the change is made on top
// of (the tag's newest record when it was approved).
var ArtifactTypePolicyApproval = artifact.ArtifactType("policy-approval")

// PolicyApproval is the predicate of a policy-change approval: a person,
// by their key, says Target's bound policy may change from Current to
// Proposed, on top of release record Record.
type PolicyApproval struct {
	Target   string `json:"target"`
	Current  string `json:"currentPolicy"`
	Proposed string `json:"proposedPolicy"`
	Record   string `json:"record"`
	Approver Actor  `json:"approver"`
	Time     string `json:"time"`
	Comment  string `json:"comment,omitempty"`
}

// PolicyChangeRequest is what ApprovePolicy and BindPolicy need.
type PolicyChangeRequest struct {
	Target registry.Ref
	// Policy is the policy to bind (or whose binding is approved).
	Policy *policy.Policy
	// Key signs; an approval needs one, a binding needs one when the
	// bound policy lists who may promote.
	Key     *Key
	User    string
	Comment string // the approval's comment, the record's reason
	Now     time.Time
}

// PolicyChangeResult is what BindPolicy did.
type PolicyChangeResult struct {
	Target   string `json:"target"`
	From     string `json:"fromPolicy,omitempty"`
	To       string `json:"toPolicy"`
	Record   string `json:"record,omitempty"`
	NoOp     bool   `json:"noOp"`
	First    bool   `json:"first"`
	Adopted  bool   `json:"adopted"`
	Required int    `json:"required"`
	// Approvals are the policy-change approvals judged.
	Approvals []ApprovalCheck `json:"approvals,omitempty"`
	Diff      []string        `json:"diff,omitempty"`
}

// ApprovePolicy signs an approval that req.Target's bound policy may
// change to req.Policy, on top of the tag's newest release record. It
// refuses when the tag has no bound policy (the first binding needs no
// approvals), when req.Policy is the bound policy, or when it has no rule
// for the target. It returns the approval's descriptor and what changes.
func ApprovePolicy(ctx context.Context, store registry.Store, req PolicyChangeRequest) (v1.Descriptor, []string, error) {
	t := req.Target
	if req.Key == nil {
		return v1.Descriptor{}, nil, errkind.New(errkind.BadInput, "an approval needs a signing key")
	}
	if err := checkTarget(t); err != nil {
		return v1.Descriptor{}, nil, err
	}
	if _, err := req.Policy.Rule(t.String()); err != nil {
		return v1.Descriptor{}, nil, err
	}
	s, err := readState(ctx, store, t)
	if err != nil {
		return v1.Descriptor{}, nil, err
	}
	b, err := boundOf(ctx, store, s)
	if err != nil {
		return v1.Descriptor{}, nil, err
	}
	if b.Policy == nil {
		return v1.Descriptor{}, nil, errkind.New(errkind.BadInput, "%s has no bound policy: its first binding needs no approvals (`modelgate policy bind`)", t)
	}
	if b.Policy.Digest() == req.Policy.Digest() {
		return v1.Descriptor{}, nil, errkind.New(errkind.BadInput, "%s is already the policy bound to %s: nothing to approve", req.Policy.Source, t)
	}
	head := s.head
	if s.pending != nil {
		head = s.pending
	}
	if _, err := StorePolicy(ctx, store, t.Repository, req.Policy, mustDigest(head.Record.To), t.String()); err != nil {
		return v1.Descriptor{}, nil, err
	}
	now := nowUTC(req.Now)
	pred := PolicyApproval{Target: t.String(), Current: b.Policy.Digest(), Proposed: req.Policy.Digest(), Record: head.Digest.String(),
		Approver: Actor{Name: req.Key.Name, KeyID: req.Key.ID}, Time: now.Format(time.RFC3339), Comment: req.Comment}
	st, err := newStatement(t.Repository, head.Digest.String(), PredicatePolicyApproval, pred)
	if err != nil {
		return v1.Descriptor{}, nil, err
	}
	env, err := Sign(ctx, req.Key, st)
	if err != nil {
		return v1.Descriptor{}, nil, err
	}
	d, err := putArtifact(ctx, store, t.Repository, ArtifactTypePolicyApproval,
		[]artifact.Blob{artifact.NewBlob(MediaTypeEnvelope, env, map[string]string{artifact.AnnotationTitle: "policy-approval.dsse.json"})},
		head.Desc, map[string]string{artifact.AnnotationCreated: pred.Time, AnnotationTarget: pred.Target, AnnotationSigner: req.Key.ID})
	return d, policy.Diff(b.Policy, req.Policy), err
}

func mustDigest(s string) v1.Hash {
	h, _ := registry.ParseDigest(s)
	return h
}

// policyApprovalContext is what a policy-change approval must match.
type policyApprovalContext struct {
	target, current, proposed, record string
	approvers                         []PublicKey
	maxAge                            time.Duration
	now                               time.Time
	binder                            promoterID
	allowSelf                         bool
}

// checkPolicyApprovals judges the policy-change approvals stored about
// record; each key counts once.
func checkPolicyApprovals(ctx context.Context, store registry.Store, repo string, c policyApprovalContext) ([]ApprovalCheck, int, error) {
	rd, err := registry.ParseDigest(c.record)
	if err != nil {
		return nil, 0, err
	}
	descs, err := store.Referrers(ctx, repo, rd, ArtifactTypePolicyApproval)
	if err != nil {
		return nil, 0, fmt.Errorf("listing the approvals of the policy change: %w", err)
	}
	var ds []v1.Hash
	for _, d := range descs {
		ds = append(ds, d.Digest)
	}
	return countPolicyApprovals(ctx, store, repo, ds, c)
}

func countPolicyApprovals(ctx context.Context, store registry.Store, repo string, ds []v1.Hash, c policyApprovalContext) ([]ApprovalCheck, int, error) {
	var out []ApprovalCheck
	counted := map[string]bool{}
	for _, d := range ds {
		ac := checkPolicyApproval(ctx, store, repo, d, c)
		if ac.Counted && counted[ac.Approver.KeyID] {
			ac.Counted, ac.Why = false, "another approval by the same key counts instead (each key counts once)"
		}
		if ac.Counted {
			counted[ac.Approver.KeyID] = true
		}
		out = append(out, ac)
	}
	return out, len(counted), nil
}

func checkPolicyApproval(ctx context.Context, store registry.Store, repo string, d v1.Hash, c policyApprovalContext) ApprovalCheck {
	ac := ApprovalCheck{Digest: d.String()}
	s, err := readSigned(ctx, store, repo, d, ArtifactTypePolicyApproval)
	if err != nil {
		ac.Why, ac.integrity = "unreadable: "+err.Error(), errkind.Is(err, errkind.Integrity)
		return ac
	}
	st := &s.Envelope.Statement
	var pred PolicyApproval
	if st.PredicateType != PredicatePolicyApproval || json.Unmarshal(st.Predicate, &pred) != nil {
		ac.Why = "not a policy-change approval"
		return ac
	}
	ac.Approver, ac.Time, ac.Comment = pred.Approver, pred.Time, pred.Comment
	var why []string
	verified := s.Envelope.VerifiedBy(ctx, c.approvers)
	switch {
	case !s.Envelope.Signed():
		why = append(why, "not signed")
	case len(verified) == 0:
		why = append(why, fmt.Sprintf("signed by key %s, which the bound policy does not list as an approver", strings.Join(s.Envelope.KeyIDs(), ", ")))
	case verified[0].ID != pred.Approver.KeyID:
		why = append(why, fmt.Sprintf("signed by %s but names approver key %s", verified[0].ID, pred.Approver.KeyID))
	default:
		ac.Approver = Actor{Name: verified[0].Name, KeyID: verified[0].ID}
		ac.Verified = true
	}
	if pred.Target != c.target || pred.Current != c.current || pred.Proposed != c.proposed || pred.Record != c.record || !st.About(c.record) {
		why = append(why, fmt.Sprintf("it approves %s: policy %s → %s on top of record %s, not this change (%s → %s on top of %s)",
			pred.Target, shortHex(pred.Current), shortHex(pred.Proposed), shortHex(pred.Record), shortHex(c.current), shortHex(c.proposed), shortHex(c.record)))
	}
	t, err := time.Parse(time.RFC3339, pred.Time)
	switch {
	case err != nil:
		why = append(why, fmt.Sprintf("its time %q is not RFC 3339", pred.Time))
	case c.now.Sub(t) > c.maxAge:
		why = append(why, fmt.Sprintf("expired: given %s ago, the policy allows %s", c.now.Sub(t).Round(time.Second), c.maxAge))
	case t.Sub(c.now) > maxClockSkew:
		why = append(why, fmt.Sprintf("dated %s in the future", t.Sub(c.now).Round(time.Second)))
	}
	if len(verified) > 0 && !c.allowSelf && c.binder.id != "" && (verified[0].ID == c.binder.id || c.binder.names[verified[0].Name]) {
		why = append(why, "self-approval: the approver is the one binding the policy, and the policy in force forbids approving one's own change")
	}
	if len(why) > 0 {
		ac.Why = strings.Join(why, "; ")
		return ac
	}
	ac.Counted = true
	return ac
}

// BindPolicy binds req.Policy to req.Target with a policy record: the
// tag does not move. The first binding of a tag that has no release log,
// or whose log never promoted (only setup records), needs only a signing
// key (one of releasers.promote when the policy lists them). A tag whose
// log was made before policies were bound adopts only the policy its
// newest promotion was judged under (its file digest or digest). A change
// of a bound policy needs the approvals the bound policy asks for
// (approvals.required distinct approvers, signed over the new policy's
// digest on top of the tag's newest record, with the self-approval rule
// judged against the signer of the change), and a signer the bound policy
// lets promote. Refusals are *Refusal wrapped in their kind.
func BindPolicy(ctx context.Context, store registry.Store, req PolicyChangeRequest) (*PolicyChangeResult, error) {
	t := req.Target
	if err := checkTarget(t); err != nil {
		return nil, err
	}
	newRule, err := req.Policy.Rule(t.String())
	if err != nil {
		return nil, err
	}
	sw, err := swapper(store)
	if err != nil {
		return nil, err
	}
	s, _, err := settledState(ctx, store, sw, t, false)
	if err != nil {
		return nil, err
	}
	res := &PolicyChangeResult{Target: t.String(), To: req.Policy.Digest()}
	no := func(k errkind.Kind, format string, args ...any) error {
		return refuse(&Refusal{Kind: k, Action: "policy bind", Problems: []string{fmt.Sprintf(format, args...)}, Approvals: res.Approvals})
	}
	if s.external {
		return res, no(errkind.Integrity, "%s points at %s but its newest release record says %s: the tag was moved outside modelgate; `modelgate rollback %s` first", t, orNone(s.current()), s.head.Record.To, t)
	}
	if s.current() == "" {
		return res, no(errkind.BadInput, "%s does not exist: the first promote to it binds the policy it is given", t)
	}
	b, err := boundOf(ctx, store, s)
	if err != nil {
		return nil, err
	}
	now := nowUTC(req.Now)
	rec := &Record{Kind: KindPolicy, Target: t.String(), From: s.current(), To: s.current(), Reason: req.Comment,
		By: whoUnsigned(req.User), Time: now.Format(time.RFC3339), Policy: req.Policy.Digest()}
	var released []string
	var reuse *v1.Descriptor
	switch {
	case b.Policy != nil && b.Policy.Digest() == req.Policy.Digest():
		res.From, res.NoOp = b.Policy.Digest(), true
		return res, nil
	case b.Policy != nil:
		res.From, res.Diff = b.Policy.Digest(), policy.Diff(b.Policy, req.Policy)
		rule, err := b.Policy.Rule(t.String())
		if err != nil {
			return nil, errkind.New(errkind.Integrity, "the policy bound to %s has no rule for it: %v", t, err)
		}
		if msg := releaserCheck(rule, KindPromote, req.Key); msg != "" {
			return res, no(errkind.Unauthorized, "%s", msg)
		}
		res.Required = rule.Approvals.Required
		var binder promoterID
		if req.Key != nil {
			binder.id = req.Key.ID
			binder.names, _ = promoterIdentity(rule, req.Key.Public)
		}
		if !rule.Approvals.AllowSelfApproval && rule.Approvals.Required > 0 && len(binder.names) == 0 {
			return res, no(errkind.Unauthorized, "the bound policy forbids self-approval, so a policy change must be signed with a key it lists (releasers.promote or approvals.approvers)")
		}
		approvers, err := TrustedKeys(rule.Approvals.Approvers)
		if err != nil {
			return nil, err
		}
		var counted int
		res.Approvals, counted, err = checkPolicyApprovals(ctx, store, t.Repository, policyApprovalContext{target: t.String(),
			current: b.Policy.Digest(), proposed: req.Policy.Digest(), record: s.head.Digest.String(), approvers: approvers,
			maxAge: rule.Approvals.MaxAge, now: now, binder: binder, allowSelf: rule.Approvals.AllowSelfApproval})
		if err != nil {
			return nil, err
		}
		if counted < rule.Approvals.Required {
			probs := []string{fmt.Sprintf("changing the policy bound to %s needs %d approval(s) from the approvers the bound policy lists, signed over the new policy (`modelgate policy approve %s --policy FILE --key KEY`); %d count", t, rule.Approvals.Required, t, counted)}
			for _, a := range res.Approvals {
				if !a.Counted {
					probs = append(probs, fmt.Sprintf("approval %s by %s does not count: %s", shortHex(a.Digest), a.Approver, a.Why))
				}
			}
			return res, refuse(&Refusal{Kind: errkind.Unauthorized, Action: "policy bind", Problems: probs, Approvals: res.Approvals})
		}
		for _, a := range res.Approvals {
			if a.Counted {
				rec.Approvals = append(rec.Approvals, a.Digest)
			}
		}
		rec.PolicyDigest = b.Policy.Digest()
	case s.head != nil:
		// A log from before policies were bound: adopt the policy its
		// newest promotion was judged under, if it has one.
		want, err := lastJudgedPolicy(ctx, store, t, s.head)
		if err != nil {
			return nil, err
		}
		if want != "" && want != req.Policy.FileDigest() && want != req.Policy.Digest() {
			return res, no(errkind.Unauthorized, "the newest promotion of %s was judged under policy %s; %s (file digest %s) is another: bind that policy first, then change it with the approvals it asks for", t, shortHex(want), req.Policy.Source, shortHex(req.Policy.FileDigest()))
		}
		res.Adopted, res.First = want != "", true
		if msg := releaserCheck(newRule, KindPromote, req.Key); msg != "" {
			return res, no(errkind.Unauthorized, "%s", msg)
		}
	default:
		res.First = true
		if msg := releaserCheck(newRule, KindPromote, req.Key); msg != "" {
			return res, no(errkind.Unauthorized, "%s", msg)
		}
	}
	if s.head != nil {
		rec.Previous = s.head.Digest.String()
		rec.Restore = s.head.Record.Restore
		r := s.head.released
		reuse = &r
	} else {
		released = []string{s.current()}
	}
	if _, err := StorePolicy(ctx, store, t.Repository, req.Policy, mustDigest(s.current()), t.String()); err != nil {
		return nil, err
	}
	pb := policyBlob(req.Policy)
	recDesc, err := writeRecord(ctx, store, t.Repository, rec, released, reuse, req.Key, &pb)
	if err != nil {
		return nil, fmt.Errorf("writing the policy record: %w", err)
	}
	res.Record = recDesc.Digest.String()
	// The tag does not move: the head pointer's compare-and-swap is the
	// commit point.
	if err := sw.SwapTag(ctx, t.Repository, s.headTag, s.headDigest(), recDesc); err != nil {
		if errorsIsConflict(err) {
			return res, no(errkind.Conflict, "the release log of %s moved while this ran (a concurrent release won); nothing changed, the unused record %s is harmless: try again", t, shortHex(res.Record))
		}
		return res, fmt.Errorf("advancing the release log head of %s: %w", t, err)
	}
	return res, markCommitted(ctx, store, s, recDesc)
}

// lastJudgedPolicy walks a log from head back to its newest promotion and
// returns the policy digest it was judged under ("" when none promoted).
func lastJudgedPolicy(ctx context.Context, store registry.Store, t registry.Ref, head *loadedRecord) (string, error) {
	seen := map[string]bool{}
	for r := head; r != nil; {
		if r.Record.Kind == KindPromote && r.Record.PolicyDigest != "" {
			return r.Record.PolicyDigest, nil
		}
		p := r.Record.Previous
		if p == "" || seen[p] {
			return "", nil
		}
		seen[p] = true
		var err error
		if r, err = readRecord(ctx, store, t.Repository, mustDigest(p), t.String()); err != nil {
			return "", err
		}
	}
	return "", nil
}

func errorsIsConflict(err error) bool { return errors.Is(err, registry.ErrConflict) }
