package release

import (
	"context"
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

// Severities of a log finding.
const (
	// SeverityDamage: the log or the tag is inconsistent (exit 5).
	SeverityDamage = "damage"
	// SeverityUntrusted: a record is unsigned or signed by a key the
	// trusted set does not hold (exit 4).
	SeverityUntrusted = "untrusted"
	// SeverityNote: worth knowing, not wrong (an adopted tag, a repaired
	// external move, records that never took effect).
	SeverityNote = "note"
)

// Finding is one thing Log noticed, labelled by where.
type Finding struct {
	Severity string `json:"severity"`
	// Where is a record digest or the tag.
	Where   string `json:"where"`
	Message string `json:"message"`
}

// LogEntry is one record of the log.
type LogEntry struct {
	Digest string `json:"digest"`
	Record Record `json:"record"`
	// Verified is true when the record is signed and its signature
	// verifies with the key it names.
	Verified bool `json:"verified"`
	// Number is the release's number in the log, 1 for the oldest (what
	// `rollback --to N` takes).
	Number int `json:"number"`
}

// LogReport is a tag's release log, newest record first, with what
// verifying it found.
type LogReport struct {
	Target string `json:"target"`
	// Current is what the tag points at now ("" when absent).
	Current string `json:"current,omitempty"`
	// Head is the newest record's digest ("" when there is no log).
	Head     string     `json:"head,omitempty"`
	Entries  []LogEntry `json:"entries"`
	Findings []Finding  `json:"findings"`
	// Names maps the digests the records moved the tag from and to onto
	// the tags (NAME:TAG) that point at them now; a digest no tag names
	// is absent.
	Names map[string][]string `json:"names,omitempty"`
	// NoLog is true when the tag exists but was only ever pushed: it has
	// no release log, and nothing is wrong with that.
	NoLog bool `json:"noLog,omitempty"`
}

// Worst returns the kind of the gravest finding: errkind.Integrity for
// damage, errkind.Unauthorized for untrusted records, 0 otherwise.
func (r *LogReport) Worst() errkind.Kind {
	var k errkind.Kind
	for _, f := range r.Findings {
		switch f.Severity {
		case SeverityDamage:
			return errkind.Integrity
		case SeverityUntrusted:
			k = errkind.Unauthorized
		}
	}
	return k
}

// LogOptions tune Log.
type LogOptions struct {
	// Trusted, when not nil, are the keys whose records are trusted;
	// records signed otherwise, or unsigned, are reported as untrusted.
	Trusted []PublicKey
	// Policy, when not nil, is a policy (from a file) to cross-check: a
	// tag whose bound policy differs is reported as untrusted, with what
	// differs. Every record is judged by the policy in force at it
	// whether or not Policy is given.
	Policy *policy.Policy
}

func (r *LogReport) add(sev, where, format string, args ...any) {
	r.Findings = append(r.Findings, Finding{Severity: sev, Where: where, Message: fmt.Sprintf(format, args...)})
}

// Log walks target's release log from its head to its first record,
// verifying every record's signature, every link, each record's "from"
// against the previous record's "to", the released index, that every
// rollback went to a digest released before, and that the tag points
// where the newest record says. Everything found is in the report's
// Findings; the error is for failures to read at all.
func Log(ctx context.Context, store registry.Store, target registry.Ref, opts LogOptions) (*LogReport, error) {
	if err := checkTarget(target); err != nil {
		return nil, err
	}
	s, err := readStateLenient(ctx, store, target)
	if err != nil {
		return nil, err
	}
	rep := &LogReport{Target: target.String(), Current: s.current(), Entries: []LogEntry{}, Findings: []Finding{}}
	repo := target.Repository
	tname := target.String()
	if s.headDesc == nil {
		if s.tagDesc == nil {
			return nil, errkind.New(errkind.BadInput, "%s does not exist and has no release log", target)
		}
		n := len(rep.Findings)
		orphans(ctx, store, target, rep, nil)
		if len(rep.Findings) > n {
			rep.add(SeverityDamage, tname, "%s points at %s and has release records, but no release log head %s: the head pointer was deleted or the tag was set outside modelgate", target, s.current(), s.headTag)
		} else {
			rep.NoLog = true
			rep.add(SeverityNote, tname, "%s has no release log: it was pushed (it points at %s) and never promoted or rolled back; `modelgate promote` starts its log", target, s.current())
		}
		rep.Names = tagNames(ctx, store, repo, []string{s.current()})
		return rep, nil
	}
	rep.Head = s.headDesc.Digest.String()

	// Walk newest to oldest.
	var chain []*loadedRecord
	inChain := map[string]bool{}
	next := s.headDesc.Digest
	namedBy := "the head pointer " + s.headTag
	for {
		if inChain[next.String()] {
			rep.add(SeverityDamage, next.String(), "the chain loops back to record %s", next)
			break
		}
		lr, err := readRecord(ctx, store, repo, next, tname)
		if err != nil {
			rep.add(SeverityDamage, next.String(), "record named by %s is missing, edited or invalid: %v", namedBy, err)
			break
		}
		chain = append(chain, lr)
		inChain[next.String()] = true
		rep.Entries = append(rep.Entries, LogEntry{Digest: next.String(), Record: lr.Record, Verified: lr.Signer != nil})
		if lr.Record.Previous == "" {
			break
		}
		d, err := registry.ParseDigest(lr.Record.Previous)
		if err != nil {
			rep.add(SeverityDamage, next.String(), "its previous-record link %q is malformed", lr.Record.Previous)
			break
		}
		namedBy = "record " + shortHex(next.String())
		next = d
	}

	// Trust.
	if opts.Trusted != nil {
		for _, lr := range chain {
			switch {
			case lr.Signer == nil:
				rep.add(SeverityUntrusted, lr.Digest.String(), "unsigned (by %s): no trusted key vouches for it", lr.Record.By.Name)
			case !trustedKey(opts.Trusted, *lr.Signer):
				rep.add(SeverityUntrusted, lr.Digest.String(), "signed by %s, a key the policy does not list", lr.Record.By)
			}
		}
	}

	// Oldest to newest: continuity, the policy in force, released index,
	// rollbacks, restores.
	pj := &policyJudge{policies: map[string]*policy.Policy{}, ended: map[string]string{}}
	released := map[string]bool{}
	var order []string
	byDigest := map[string]*loadedRecord{}
	for i := len(chain) - 1; i >= 0; i-- {
		lr := chain[i]
		r := &lr.Record
		where := lr.Digest.String()
		byDigest[where] = lr
		if i == len(chain)-1 && r.Previous == "" {
			if r.From != "" && r.From != r.To {
				rep.add(SeverityNote, where, "the tag existed before its first record, pointing at %s (adopted)", r.From)
				released[r.From] = true
				order = append(order, r.From)
			}
		} else if i < len(chain)-1 {
			prev := &chain[i+1].Record
			switch {
			case r.From == prev.To:
			case r.External:
				rep.add(SeverityNote, where, "the tag had been moved outside modelgate to %s after record %s; this %s repaired it", orNone(r.From), shortHex(chain[i+1].Digest.String()), r.Kind)
			default:
				rep.add(SeverityDamage, where, "gap: record %s left the tag at %s but this record moved it from %s: the tag was moved outside modelgate in between", shortHex(chain[i+1].Digest.String()), prev.To, orNone(r.From))
			}
		}
		judgeRecord(ctx, store, target, rep, lr, pj)
		if r.Kind == KindRollback && !released[r.To] {
			rep.add(SeverityDamage, where, "rollback to %s, which was never released on the tag before", r.To)
		}
		if r.Kind == KindInitial && i != len(chain)-1 {
			rep.add(SeverityDamage, where, "an initial record in the middle of the log")
		}
		if !released[r.To] {
			released[r.To] = true
			order = append(order, r.To)
		}
		if r.Restore != nil && r.Restore.Record != "" {
			rr, ok := byDigest[r.Restore.Record]
			switch {
			case !ok:
				rep.add(SeverityDamage, where, "its undo names record %s, which is not earlier in the log", shortHex(r.Restore.Record))
			case rr.Record.To != r.Restore.Target:
				rep.add(SeverityDamage, where, "its undo restores %s, but record %s released %s", r.Restore.Target, shortHex(r.Restore.Record), rr.Record.To)
			}
		}
		if r.Kind == KindPromote && r.Previous != "" && (r.Restore == nil || r.Restore.Record != r.Previous || r.Restore.Target != r.From) {
			rep.add(SeverityDamage, where, "a promotion whose undo is not its previous record")
		}
		list, err := lr.releasedList(ctx, store, repo)
		if err != nil {
			rep.add(SeverityDamage, where, "%v", err)
		} else if !sameList(list, order) {
			rep.add(SeverityDamage, where, "its released index lists %d digest(s), the log up to it released %d", len(list), len(order))
		}
	}

	// The tag against the head.
	if len(chain) > 0 && chain[0].Digest == s.headDesc.Digest {
		head := &chain[0].Record
		if len(head.Unit) > 0 && (head.From == s.current() || head.To == s.current()) {
			unitFindings(ctx, store, target, chain[0], rep)
		} else if head.To != s.current() {
			if p := findPendingFor(ctx, store, target, s, chain[0]); p != nil {
				rep.add(SeverityDamage, tname, "interrupted: record %s (%s by %s) moved %s to %s but the head pointer was not advanced; the next promote or rollback completes it", p.Digest, p.Record.Kind, p.Record.By, target, s.current())
			} else {
				rep.add(SeverityDamage, tname, "%s points at %s, but its newest release record says %s: the tag was moved outside modelgate (`modelgate rollback %s` restores %s)", target, orNone(s.current()), head.To, target, head.To)
			}
		}
	}
	if opts.Policy != nil && len(chain) > 0 && chain[0].Digest == s.headDesc.Digest {
		switch b := pj.inForce; {
		case b == nil:
			rep.add(SeverityNote, tname, "%s has no bound policy; --policy %s was used only for the keys it trusts", target, opts.Policy.Source)
		case b.Digest() != opts.Policy.Digest():
			rep.add(SeverityUntrusted, tname, "%s is not the policy bound to %s (%s); it changes: %s", opts.Policy.Source, target, shortHex(b.Digest()), strings.Join(policy.Diff(b, opts.Policy), "; "))
		}
	}
	orphans(ctx, store, target, rep, inChain)
	var ds []string
	for i := range rep.Entries {
		e := &rep.Entries[i]
		e.Number = len(rep.Entries) - i
		ds = append(ds, e.Record.From, e.Record.To)
	}
	rep.Names = tagNames(ctx, store, repo, ds)
	return rep, nil
}

// policyJudge carries, along a log walked oldest to newest, the policy in
// force and the reports and approvals rollbacks ended.
type policyJudge struct {
	inForce  *policy.Policy
	policies map[string]*policy.Policy
	ended    map[string]string // digest → why it no longer counts
}

// judgeRecord judges one record by the policy in force at it (the
// previous record's bound policy; for the record that first binds a
// policy, that policy): who signed it, and for a promotion its gate
// report and approvals, as promote would have judged them at the record's
// time; for a policy change, the approvals of the policy it replaced.
// What does not hold is reported as untrusted.
func judgeRecord(ctx context.Context, store registry.Store, target registry.Ref, rep *LogReport, lr *loadedRecord, pj *policyJudge) {
	r := &lr.Record
	where := lr.Digest.String()
	repo := target.Repository
	untrusted := func(format string, args ...any) { rep.add(SeverityUntrusted, where, format, args...) }
	var recPol *policy.Policy
	if lr.policy != nil {
		if p, ok := pj.policies[r.Policy]; ok {
			recPol = p
		} else {
			p, err := lr.boundPolicy(ctx, store, repo)
			if err != nil {
				rep.add(SeverityDamage, where, "its bound policy: %v", err)
			}
			pj.policies[r.Policy], recPol = p, p
		}
	}
	prev := pj.inForce
	defer func() {
		pj.inForce = recPol
		if r.Kind == KindRollback {
			for _, d := range r.Ended {
				pj.ended[d] = fmt.Sprintf("ended by rollback %s (%s)", shortHex(where), r.Time)
			}
		}
	}()
	switch {
	case prev == nil && recPol != nil:
		rep.add(SeverityNote, where, "binds policy %s (%s) to %s: the first policy of the tag", recPol.Name, shortHex(recPol.Digest()), target)
	case prev != nil && recPol == nil:
		untrusted("it drops the policy bound to %s (%s): modelgate never writes such a record", target, shortHex(prev.Digest()))
		return
	case prev != nil && recPol != nil && recPol.Digest() != prev.Digest() && r.Kind != KindPolicy:
		untrusted("it changes the policy bound to %s (%s → %s) without a policy record and its approvals", target, shortHex(prev.Digest()), shortHex(recPol.Digest()))
	}
	judgeBy := prev
	if judgeBy == nil {
		judgeBy = recPol
	}
	if judgeBy == nil {
		return // a record from before policies were bound
	}
	rule, err := judgeBy.Rule(target.String())
	if err != nil {
		untrusted("the policy in force has no rule for %s", target)
		return
	}
	var signerKey *Key
	if lr.Signer != nil {
		signerKey = &Key{Name: lr.Signer.Name, ID: lr.Signer.ID, Public: lr.Signer.Public}
	}
	now, terr := time.Parse(time.RFC3339, r.Time)
	if terr != nil {
		untrusted("its time %q is not RFC 3339", r.Time)
		return
	}
	var signer promoterID
	if lr.Signer != nil {
		signer.id = lr.Signer.ID
		signer.names, _ = promoterIdentity(rule, lr.Signer.Public)
	}
	switch r.Kind {
	case KindRollback:
		if msg := releaserCheck(rule, KindRollback, signerKey); msg != "" {
			untrusted("%s", msg)
		}
	case KindPolicy:
		if prev == nil {
			if msg := releaserCheck(rule, KindPromote, signerKey); msg != "" {
				untrusted("%s", msg)
			}
			return
		}
		if msg := releaserCheck(rule, KindPromote, signerKey); msg != "" {
			untrusted("%s", msg)
		}
		if r.PolicyDigest != prev.Digest() {
			untrusted("it says it replaced policy %s, but %s was in force", shortHex(r.PolicyDigest), shortHex(prev.Digest()))
		}
		approvers, _ := TrustedKeys(rule.Approvals.Approvers)
		var ds []v1.Hash
		for _, a := range r.Approvals {
			if d, err := registry.ParseDigest(a); err == nil {
				ds = append(ds, d)
			}
		}
		acs, counted, _ := countPolicyApprovals(ctx, store, repo, ds, policyApprovalContext{target: target.String(), current: prev.Digest(),
			proposed: r.Policy, record: r.Previous, approvers: approvers, maxAge: rule.Approvals.MaxAge, now: now, binder: signer,
			allowSelf: rule.Approvals.AllowSelfApproval})
		if counted < rule.Approvals.Required {
			untrusted("a policy change with %d of the %d approvals the policy in force requires%s", counted, rule.Approvals.Required, whyNot(acs))
		}
	case KindPromote:
		if msg := releaserCheck(rule, KindPromote, signerKey); msg != "" {
			untrusted("%s", msg)
		}
		if r.PolicyDigest != judgeBy.Digest() {
			untrusted("it was judged under policy %s, but %s was in force", shortHex(r.PolicyDigest), shortHex(judgeBy.Digest()))
		}
		signers, _ := TrustedKeys(rule.Approvals.ReportSigners)
		reports := map[string]bool{}
		if d, err := registry.ParseDigest(r.Report); err != nil {
			untrusted("it names no gate report")
		} else {
			rc := checkReport(ctx, store, repo, d, Binding{Candidate: r.To, Target: target.String(), Baseline: r.From,
				Policy: judgeBy.Digest(), Tool: r.Tool, Signers: signers, anyHoldout: true})
			switch why, ended := pj.ended[r.Report]; {
			case ended:
				untrusted("its gate report %s was %s", shortHex(r.Report), why)
			case !rc.Usable:
				untrusted("its gate report %s does not hold under the policy in force: %s", shortHex(r.Report), rc.Why)
			default:
				reports[r.Report] = true
			}
		}
		if rule.Approvals.Required == 0 {
			return
		}
		if !rule.Approvals.AllowSelfApproval && len(signer.names) == 0 {
			untrusted("the policy in force forbids self-approval, but the promotion is not signed by a key it lists")
		}
		approvers, _ := TrustedKeys(rule.Approvals.Approvers)
		c := approvalContext{candidate: r.To, target: target.String(), policy: judgeBy.Digest(), reports: reports, approvers: approvers,
			maxAge: rule.Approvals.MaxAge, now: now, promoter: signer.id, promoterNames: signer.names,
			allowSelf: rule.Approvals.AllowSelfApproval, ended: pj.ended}
		var acs []ApprovalCheck
		counted := map[string]bool{}
		for _, a := range r.Approvals {
			d, err := registry.ParseDigest(a)
			if err != nil {
				continue
			}
			ac := checkApproval(ctx, store, repo, d, c)
			if ac.Counted && counted[ac.Approver.KeyID] {
				ac.Counted, ac.Why = false, "another approval by the same key is listed too"
			}
			if ac.Counted {
				counted[ac.Approver.KeyID] = true
			}
			acs = append(acs, ac)
		}
		if len(counted) < rule.Approvals.Required {
			untrusted("a promotion with %d of the %d approvals the policy in force requires%s", len(counted), rule.Approvals.Required, whyNot(acs))
		}
	}
}

func whyNot(acs []ApprovalCheck) string {
	var out []string
	for _, a := range acs {
		if !a.Counted {
			out = append(out, fmt.Sprintf("approval %s by %s: %s", shortHex(a.Digest), a.Approver, a.Why))
		}
	}
	if len(out) == 0 {
		return ""
	}
	return " (" + strings.Join(out, "; ") + ")"
}

// readStateLenient reads the head pointer and the tag without judging
// the head record (Log reports problems instead of failing).
func readStateLenient(ctx context.Context, store registry.Store, target registry.Ref) (*lenientState, error) {
	ht, err := headTag(target.Tag)
	if err != nil {
		return nil, err
	}
	s := &lenientState{headTag: ht}
	hd, err := store.Resolve(ctx, target.Repository, ht)
	switch {
	case errors.Is(err, registry.ErrNotFound):
	case err != nil:
		return nil, err
	default:
		s.headDesc = &hd
	}
	td, err := store.Resolve(ctx, target.Repository, target.Tag)
	switch {
	case errors.Is(err, registry.ErrNotFound):
	case err != nil:
		return nil, err
	default:
		s.tagDesc = &td
	}
	return s, nil
}

type lenientState struct {
	headTag  string
	headDesc *v1.Descriptor
	tagDesc  *v1.Descriptor
}

func (s *lenientState) current() string {
	if s.tagDesc == nil {
		return ""
	}
	return s.tagDesc.Digest.String()
}

func findPendingFor(ctx context.Context, store registry.Store, target registry.Ref, s *lenientState, head *loadedRecord) *loadedRecord {
	st := &state{target: target, headTag: s.headTag, tagDesc: s.tagDesc, head: head}
	return findPending(ctx, store, st)
}

// orphans notes records of the tag that are not in the chain: promotes
// that lost a race or stopped before moving the tag. It needs a store
// that lists manifests; others are skipped.
func orphans(ctx context.Context, store registry.Store, target registry.Ref, rep *LogReport, inChain map[string]bool) {
	ml, ok := store.(registry.ManifestLister)
	if !ok {
		return
	}
	ds, err := ml.Manifests(ctx, target.Repository)
	if err != nil {
		return
	}
	var out []string
	for _, d := range ds {
		if inChain[d.Digest.String()] {
			continue
		}
		at, ann := d.ArtifactType, d.Annotations
		if at == "" {
			// A registry lists its manifests by digest alone: read the
			// manifest for its type and target.
			a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: target.Repository, Digest: d.Digest})
			if err != nil {
				continue
			}
			at, ann = a.Manifest.ArtifactType, a.Manifest.Annotations
		}
		if at == ArtifactTypeRelease && ann[AnnotationTarget] == target.String() {
			out = append(out, d.Digest.String())
		}
	}
	sort.Strings(out)
	for _, d := range out {
		// Without a chain (head pointer gone) every record is outside it;
		// the markers say nothing then.
		if inChain != nil && committedMarked(ctx, store, target.Repository, d) {
			rep.add(SeverityDamage, d, "a record of %s whose promote or rollback saw its tag move succeed and reported success, but that is no longer in the chain: a concurrent release overwrote it (a race on a store without compare-and-swap) or the tags were moved by hand; check that %s points at the model it should", target, target)
			continue
		}
		rep.add(SeverityNote, d, "a record of %s that never took effect (its promote or rollback lost a race or stopped before moving the tag)", target)
	}
}

// committedMarked reports whether the record d has a committed
// marker (see markCommitted).
func committedMarked(ctx context.Context, store registry.Store, repo, d string) bool {
	h, err := registry.ParseDigest(d)
	if err != nil {
		return false
	}
	ds, err := store.Referrers(ctx, repo, h, ArtifactTypeCommitted)
	return err == nil && len(ds) > 0
}

func trustedKey(keys []PublicKey, k PublicKey) bool {
	for _, t := range keys {
		if string(t.Public) == string(k.Public) {
			return true
		}
	}
	return false
}

func sameList(a, b []string) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// unitFindings reports on the release unit whose record heads target's
// log: nothing when it finished, a note when only its committed markers
// are missing, else the documented interrupted state.
func unitFindings(ctx context.Context, store registry.Store, target registry.Ref, head *loadedRecord, rep *LogReport) {
	tname := target.String()
	copies, err := loadUnit(ctx, store, head)
	if err != nil {
		rep.add(SeverityDamage, head.Digest.String(), "%v", err)
		return
	}
	var waiting []string
	marked := true
	for _, c := range copies {
		r := &c.rec.Record
		tag, err1 := resolveOrEmpty(ctx, store, c.target.Repository, c.target.Tag)
		hd, err2 := resolveOrEmpty(ctx, store, c.target.Repository, c.headTag)
		if err1 != nil || err2 != nil {
			rep.add(SeverityDamage, c.target.String(), "cannot read the tags of %s: %v %v", c.target, err1, err2)
			return
		}
		switch {
		case hd != c.rec.Digest.String() && hd != r.Previous:
			// The tag's log moved on after the unit: nothing to say here.
		case hd != c.rec.Digest.String():
			waiting = append(waiting, fmt.Sprintf("%s not claimed yet", c.target))
		case tag == r.From && r.From != r.To:
			waiting = append(waiting, fmt.Sprintf("%s not moved yet (still %s)", c.target, shortHex(tag)))
		case tag != r.To:
			rep.add(SeverityDamage, c.target.String(), "%s points at %s, but the release unit of record %s moved it to %s", c.target, orNone(tag), shortHex(head.Digest.String()), r.To)
			return
		}
		marked = marked && committedMarked(ctx, store, c.target.Repository, c.rec.Digest.String())
	}
	switch {
	case len(waiting) > 0:
		rep.add(SeverityDamage, tname, "interrupted: record %s (release unit of %s, by %s) has not finished: %s; the next promote or rollback of any of its tags completes it",
			head.Digest, strings.Join(head.Record.UnitTargets(), ", "), head.Record.By, strings.Join(waiting, "; "))
	case !marked:
		rep.add(SeverityNote, tname, "the release unit of record %s moved every tag, but the process stopped before marking it committed; the next promote or rollback marks it", shortHex(head.Digest.String()))
	}
}
