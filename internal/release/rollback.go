package release

import (
	"context"
	"fmt"
	"sort"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// RollbackRequest is what Rollback needs.
type RollbackRequest struct {
	Target registry.Ref
	// To, when not nil, is the digest to go to: it must have been released
	// on Target before. Nil: the target the newest record's undo names.
	To *v1.Hash
	// Reason says why (required).
	Reason string
	// Key signs the record; nil writes an unsigned record by User.
	Key  *Key
	User string
	// DryRun computes and returns the plan without writing anything.
	DryRun bool
	Now    time.Time
}

// RollbackResult is what Rollback did (or, with DryRun, would do).
type RollbackResult struct {
	Target string `json:"target"`
	From   string `json:"from,omitempty"`
	To     string `json:"to"`
	Record string `json:"record,omitempty"`
	DryRun bool   `json:"dryRun"`
	NoOp   bool   `json:"noOp"`
	// External is true when the tag had been moved outside modelgate and
	// the rollback restores a released model.
	External bool `json:"external"`
	// Completed names a pending record completed first (Pending: would be,
	// with DryRun).
	Completed string `json:"completed,omitempty"`
	Pending   string `json:"pending,omitempty"`
	// Earlier is what a further rollback would restore ("" when nothing).
	Earlier string `json:"earlier,omitempty"`
	// With, when the newest release moved several tags together, lists
	// every tag the rollback moves back (Target among them).
	With []UnitMove `json:"with,omitempty"`
	// Statement is the signed record's digest for such a rollback.
	Statement string `json:"statement,omitempty"`
}

// Rollback moves req.Target back, with no gate, to the target its newest
// release record's undo names (successive rollbacks walk back through the
// earlier releases), or to req.To, which must have been released on the
// tag before. It uses a constant number of store operations whatever the
// length of the log: the head record names what to restore, and its
// released index answers "released before?" in one read. It writes a
// rollback record. If the tag had been moved outside modelgate, a plain
// rollback restores the newest record's target.
func Rollback(ctx context.Context, store registry.Store, req RollbackRequest) (*RollbackResult, error) {
	t := req.Target
	if err := checkTarget(t); err != nil {
		return nil, err
	}
	if req.Reason == "" {
		return nil, errkind.New(errkind.BadInput, "rollback needs a reason")
	}
	sw, err := swapper(store)
	if err != nil {
		return nil, err
	}
	repo := t.Repository
	s, completed, err := settledState(ctx, store, sw, t, req.DryRun)
	if err != nil {
		return nil, err
	}
	if s.head == nil {
		return nil, errkind.New(errkind.BadInput, "%s has no release log: rollback goes only to versions released with modelgate", t)
	}
	res := &RollbackResult{Target: t.String(), From: s.current(), DryRun: req.DryRun, Completed: completed, External: s.external}
	bound, err := boundOf(ctx, store, s)
	if err != nil {
		return nil, err
	}
	if bound.Policy != nil {
		rule, err := bound.Policy.Rule(t.String())
		if err != nil {
			return nil, errkind.New(errkind.Integrity, "the policy bound to %s has no rule for it: %v", t, err)
		}
		if msg := releaserCheck(rule, KindRollback, req.Key); msg != "" {
			return res, refuse(&Refusal{Kind: errkind.Unauthorized, Action: "rollback", Problems: []string{msg}})
		}
	}
	cur := s.current()
	h := &s.head.Record
	if s.pending != nil { // dry run: act as if it were completed
		res.Pending = s.pending.Digest.String()
		s.head, h = s.pending, &s.pending.Record
	}
	if s.unitOpen { // dry run: act as if it were completed
		res.Pending = s.head.Digest.String()
	}
	if len(h.Unit) > 0 && !s.external {
		return rollbackUnit(ctx, store, sw, s, req, res)
	}
	var restore *Restore
	// skipped are the models a --to jump takes the tag away from besides
	// the current one: those on the undo path it passes over.
	var skipped []string
	switch {
	case req.To != nil:
		to := req.To.String()
		released, err := s.head.releasedList(ctx, store, repo)
		if err != nil {
			return nil, err
		}
		if !contains(released, to) {
			return res, refuse(&Refusal{Kind: errkind.BadInput, Action: "rollback", Problems: []string{fmt.Sprintf(
				"%s was never released on %s: rollback goes only to versions released there before (%d are)", to, t, len(released))}})
		}
		res.To = to
		restore = &Restore{Target: h.To, Record: s.head.Digest.String()}
		if skipped, err = undoPath(ctx, store, repo, t.String(), s.head, to); err != nil {
			return nil, err
		}
	case s.external:
		res.To = h.To
		restore = h.Restore
	default:
		if h.Restore == nil {
			return res, refuse(&Refusal{Kind: errkind.BadInput, Action: "rollback", Problems: []string{fmt.Sprintf(
				"nothing earlier to roll back to: %s is the first release recorded on %s", h.To, t)}})
		}
		res.To = h.Restore.Target
		if h.Restore.Record != "" {
			d, err := registry.ParseDigest(h.Restore.Record)
			if err != nil {
				return nil, errkind.New(errkind.Integrity, "release record %s names a malformed record to restore", s.head.Digest)
			}
			prev, err := readRecord(ctx, store, repo, d, t.String())
			if err != nil {
				return nil, fmt.Errorf("reading the record to restore: %w", err)
			}
			if prev.Record.To != res.To {
				return nil, errkind.New(errkind.Integrity, "release record %s says undoing it restores %s as of record %s, but that record released %s", s.head.Digest, res.To, d, prev.Record.To)
			}
			restore = prev.Record.Restore
		}
	}
	if restore != nil {
		res.Earlier = restore.Target
	}
	if res.To == cur {
		res.NoOp = true
		return res, nil
	}
	toHash, err := registry.ParseDigest(res.To)
	if err != nil {
		return nil, err
	}
	toDesc, err := subjectOf(ctx, store, repo, toHash)
	if err != nil {
		return nil, fmt.Errorf("the model to restore, %s: %w", res.To, err)
	}
	if req.DryRun {
		return res, nil
	}
	var rule *policy.Rule
	if bound.Policy != nil {
		rule, _ = bound.Policy.Rule(t.String())
	}
	if err := noteConsumer(ctx, store, t, res.To, rule); err != nil {
		return res, err
	}
	now := nowUTC(req.Now)
	rec := &Record{Kind: KindRollback, Target: t.String(), From: cur, To: res.To, Reason: req.Reason,
		By: whoUnsigned(req.User), Time: now.Format(time.RFC3339), Previous: s.head.Digest.String(),
		Restore: restore, External: s.external}
	// The rollback ends the gate reports and approvals of every model it
	// takes the tag away from.
	away := []string{}
	for _, m := range append([]string{cur}, skipped...) {
		if m != "" && m != res.To && !contains(away, m) {
			away = append(away, m)
		}
	}
	evidence := map[string][]string{}
	for _, m := range away {
		ev, err := releaseEvidence(ctx, store, repo, m, t.String())
		if err != nil {
			return nil, err
		}
		evidence[m] = ev
		rec.Ended = append(rec.Ended, ev...)
	}
	sort.Strings(rec.Ended)
	// A rollback releases nothing new: the record shares the head's
	// released index blob, which is not even read, and its bound policy.
	reuse := s.head.released
	var polBlob *artifact.Blob
	if s.head.policy != nil {
		rec.Policy, rec.PolicyDigest = s.head.Record.Policy, s.head.Record.Policy
		polBlob = &artifact.Blob{Desc: *s.head.policy}
	}
	recDesc, err := writeRecord(ctx, store, repo, rec, nil, &reuse, req.Key, polBlob)
	if err != nil {
		return nil, fmt.Errorf("writing the rollback record: %w", err)
	}
	res.Record = recDesc.Digest.String()
	for _, m := range away {
		if len(evidence[m]) == 0 {
			continue
		}
		e := EndedRelease{Target: t.String(), Model: m, Record: res.Record, Reason: req.Reason, By: rec.By.String(), Time: rec.Time, Ended: evidence[m]}
		if err := writeEnded(ctx, store, repo, e); err != nil {
			return res, fmt.Errorf("ending the approvals of %s: %w", m, err)
		}
	}
	if err := commit(ctx, store, sw, s, recDesc, toDesc); err != nil {
		return res, err
	}
	return res, nil
}

// undoPath returns the models a jump from head's state to "to" passes
// over: the targets of the undo chain from head, up to the first that is
// "to" (all of them when none is). It reads one record per step.
func undoPath(ctx context.Context, store registry.Store, repo, target string, head *loadedRecord, to string) ([]string, error) {
	var out []string
	seen := map[string]bool{}
	r := head
	for r != nil && r.Record.Restore != nil && r.Record.Restore.Target != to {
		out = append(out, r.Record.Restore.Target)
		next := r.Record.Restore.Record
		if next == "" || seen[next] {
			break
		}
		seen[next] = true
		d, err := registry.ParseDigest(next)
		if err != nil {
			return nil, errkind.New(errkind.Integrity, "release record %s names a malformed record to restore", r.Digest)
		}
		if r, err = readRecord(ctx, store, repo, d, target); err != nil {
			return nil, fmt.Errorf("reading the undo path: %w", err)
		}
	}
	return out, nil
}

func contains(list []string, d string) bool {
	for _, x := range list {
		if x == d {
			return true
		}
	}
	return false
}

// InitialRequest is what Initial needs.
type InitialRequest struct {
	Target registry.Ref
	// To is the model the tag must point at.
	To     v1.Hash
	Reason string
	Key    *Key
	User   string
	Now    time.Time
	// Policy, when not nil, is bound to the tag by the record.
	Policy *policy.Policy
}

// Initial records a tag's first release without a gate: for setup steps
// such as the demo's baseline. It refuses a tag that already has a release
// log (ErrConflict kind) and moves the tag by compare-and-swap from what
// it points at now (a tag that already exists is adopted: the record's
// From names its target).
func Initial(ctx context.Context, store registry.Store, req InitialRequest) (string, error) {
	t := req.Target
	if err := checkTarget(t); err != nil {
		return "", err
	}
	sw, err := swapper(store)
	if err != nil {
		return "", err
	}
	s, _, err := settledState(ctx, store, sw, t, false)
	if err != nil {
		return "", err
	}
	if s.head != nil {
		return "", errkind.New(errkind.Conflict, "%s already has a release log", t)
	}
	toDesc, err := subjectOf(ctx, store, t.Repository, req.To)
	if err != nil {
		return "", err
	}
	rec := &Record{Kind: KindInitial, Target: t.String(), From: s.current(), To: req.To.String(), Reason: req.Reason,
		By: whoUnsigned(req.User), Time: nowUTC(req.Now).Format(time.RFC3339)}
	released := []string{}
	if s.current() != "" && s.current() != rec.To {
		rec.Restore = &Restore{Target: s.current()}
		released = append(released, s.current())
	}
	released = appendNew(released, rec.To)
	var polBlob *artifact.Blob
	if req.Policy != nil {
		if _, err := req.Policy.Rule(t.String()); err != nil {
			return "", err
		}
		b := policyBlob(req.Policy)
		polBlob = &b
		rec.Policy, rec.PolicyDigest = req.Policy.Digest(), req.Policy.Digest()
		if _, err := StorePolicy(ctx, store, t.Repository, req.Policy, req.To, t.String()); err != nil {
			return "", err
		}
	}
	recDesc, err := writeRecord(ctx, store, t.Repository, rec, released, nil, req.Key, polBlob)
	if err != nil {
		return "", err
	}
	var rule *policy.Rule
	if req.Policy != nil {
		rule, _ = req.Policy.Rule(t.String())
	}
	if err := noteConsumer(ctx, store, t, rec.To, rule); err != nil {
		return "", err
	}
	if s.current() == rec.To { // only the head pointer is new
		if err := sw.SwapTag(ctx, t.Repository, s.headTag, v1.Hash{}, recDesc); err != nil {
			return "", fmt.Errorf("starting the release log of %s: %w", t, err)
		}
		return recDesc.Digest.String(), nil
	}
	if err := commit(ctx, store, sw, s, recDesc, toDesc); err != nil {
		return "", err
	}
	return recDesc.Digest.String(), nil
}
