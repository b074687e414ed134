package release

import (
	"context"
	"crypto/x509"
	"encoding/json"
	"encoding/pem"
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

// AnnotationUnit on a release record's manifest lists, comma-separated,
// the tags of its release unit (a hint for listings).
const AnnotationUnit = "dev.modelgate.release.unit"

// UnitMember is one tag a release unit moves.
type UnitMember struct {
	// Candidate is the digest the tag moves to, in Target's repository.
	Candidate v1.Hash
	// CandidateName is how the caller named it, for messages.
	CandidateName string
	Target        registry.Ref
	// Policy has the rule for Target.
	Policy *policy.Policy
}

// UnitRequest is what PromoteUnit needs: two or more tags, each with its
// candidate and policy, released together.
type UnitRequest struct {
	Members []UnitMember
	// Policies are further policies consulted for the coupling of encoders
	// and scorers (as PromoteRequest.Policies).
	Policies []*policy.Policy
	Key      *Key
	User     string
	Reason   string
	Now      time.Time
}

// UnitResult is what PromoteUnit did.
type UnitResult struct {
	// NoOp is true when every tag already pointed at its candidate.
	NoOp bool `json:"noOp"`
	// Members are the tags in the order they moved.
	Members []*PromoteResult `json:"members"`
	// Statement is the digest of the one signed record (the DSSE envelope
	// every tag's copy carries).
	Statement string `json:"statement,omitempty"`
	// Completed names unfinished releases completed first.
	Completed []string `json:"completed,omitempty"`
}

// unitCopy is one tag's copy of a release unit's record, with that tag's
// state.
type unitCopy struct {
	target  registry.Ref
	headTag string
	rec     *loadedRecord
}

// moveOrder sorts members for moving: scorers before encoders (see the
// package doc: a scorer pins the encoder it reads by digest, so a reader
// that loads the scorer whole stays right at every step, and the shared
// encoder, whose move changes the code for everyone, moves last), then by
// target.
func moveOrder(kinds map[string]string, targets []string) []string {
	out := append([]string(nil), targets...)
	rankOf := func(t string) int {
		if kinds[t] == policy.KindEncoder {
			return 1
		}
		return 0
	}
	sort.SliceStable(out, func(i, j int) bool {
		if rankOf(out[i]) != rankOf(out[j]) {
			return rankOf(out[i]) < rankOf(out[j])
		}
		return out[i] < out[j]
	})
	return out
}

// writeUnitRecord signs rec (whose Unit lists every tag in move order, its
// own fields unset) once and stores one copy per tag: the same envelope,
// that tag's released index (released[target], or reuse[target] already in
// the store), subject = that tag's new target. It returns the copies in
// Unit order.
func writeUnitRecord(ctx context.Context, store registry.Store, rec *Record, released map[string][]string, reuse map[string]v1.Descriptor, key *Key) ([]v1.Descriptor, error) {
	idx := make([]artifact.Blob, len(rec.Unit))
	for i := range rec.Unit {
		e := &rec.Unit[i]
		if d, ok := reuse[e.Target]; ok {
			idx[i] = artifact.Blob{Desc: d}
		} else {
			b, err := json.Marshal(releasedIndex{Target: e.Target, Released: released[e.Target]})
			if err != nil {
				return nil, err
			}
			idx[i] = artifact.NewBlob(MediaTypeReleased, b, map[string]string{artifact.AnnotationTitle: "released.json"})
		}
		e.Released = idx[i].Desc.Digest.String()
	}
	rec.project(rec.Unit[0])
	rec.Tool = toolVersion()
	if key != nil {
		rec.By = Actor{Name: key.Name, KeyID: key.ID}
		der, _ := x509.MarshalPKIXPublicKey(key.Public)
		rec.SignerPublicKey = string(pem.EncodeToMemory(&pem.Block{Type: "PUBLIC KEY", Bytes: der}))
	}
	pred, err := json.Marshal(rec)
	if err != nil {
		return nil, err
	}
	st := &Statement{Type: StatementType, PredicateType: PredicateRelease, Predicate: pred}
	subjects := make([]v1.Descriptor, len(rec.Unit))
	for i, e := range rec.Unit {
		t, err := registry.ParseRef(e.Target, false)
		if err != nil {
			return nil, err
		}
		to, err := registry.ParseDigest(e.To)
		if err != nil {
			return nil, err
		}
		if subjects[i], err = subjectOf(ctx, store, t.Repository, to); err != nil {
			return nil, fmt.Errorf("the released model %s: %w", e.To, err)
		}
		st.Subject = append(st.Subject, Subject{Name: t.Repository, Digest: map[string]string{"sha256": to.Hex}})
	}
	env, err := Sign(ctx, key, st)
	if err != nil {
		return nil, err
	}
	envBlob := artifact.NewBlob(MediaTypeEnvelope, env, map[string]string{artifact.AnnotationTitle: "release.dsse.json"})
	out := make([]v1.Descriptor, len(rec.Unit))
	for i, e := range rec.Unit {
		t, _ := registry.ParseRef(e.Target, false)
		ann := map[string]string{
			artifact.AnnotationCreated: rec.Time,
			AnnotationTarget:           e.Target,
			AnnotationKind:             rec.Kind,
			AnnotationPrevious:         e.Previous,
			AnnotationFrom:             e.From,
			AnnotationUnit:             strings.Join(rec.UnitTargets(), ","),
		}
		if key != nil {
			ann[AnnotationSigner] = key.ID
		}
		layers := []artifact.Blob{envBlob, idx[i]}
		if e.Policy != "" {
			// The tag's bound policy, already in its repository (carried by
			// its earlier records).
			pd, err := registry.ParseDigest(e.Policy)
			if err != nil {
				return nil, err
			}
			size, err := store.StatBlob(ctx, t.Repository, pd)
			if err != nil {
				return nil, fmt.Errorf("the bound policy of %s: %w", e.Target, err)
			}
			layers = append(layers, artifact.Blob{Desc: v1.Descriptor{MediaType: MediaTypePolicy, Size: size, Digest: pd}})
		}
		if out[i], err = putArtifact(ctx, store, t.Repository, ArtifactTypeRelease, layers, subjects[i], ann); err != nil {
			return nil, fmt.Errorf("writing the release record's copy for %s: %w", e.Target, err)
		}
		crashPoint("record")
	}
	return out, nil
}

// loadUnit finds every tag's copy of the release unit record lr is one
// copy of (one Referrers call per other tag), in move order.
func loadUnit(ctx context.Context, store registry.Store, lr *loadedRecord) ([]*unitCopy, error) {
	var out []*unitCopy
	for _, e := range lr.Record.Unit {
		t, err := registry.ParseRef(e.Target, false)
		if err != nil {
			return nil, errkind.New(errkind.Integrity, "release record %s names a malformed target %q", lr.Digest, e.Target)
		}
		ht, err := headTag(t.Tag)
		if err != nil {
			return nil, err
		}
		c := &unitCopy{target: t, headTag: ht}
		if e.Target == lr.Record.Target {
			c.rec = lr
		} else {
			to, err := registry.ParseDigest(e.To)
			if err != nil {
				return nil, errkind.New(errkind.Integrity, "release record %s names a malformed digest for %s", lr.Digest, e.Target)
			}
			descs, err := store.Referrers(ctx, t.Repository, to, ArtifactTypeRelease)
			if err != nil {
				return nil, fmt.Errorf("finding the copy of release record %s for %s: %w", lr.Digest, e.Target, err)
			}
			for _, d := range descs {
				if a := d.Annotations; a != nil && (a[AnnotationTarget] != e.Target || a[AnnotationPrevious] != e.Previous) {
					continue
				}
				other, err := readRecord(ctx, store, t.Repository, d.Digest, e.Target)
				if err == nil && other.envelope.Digest == lr.envelope.Digest {
					c.rec = other
					break
				}
			}
			if c.rec == nil {
				return nil, errkind.New(errkind.Integrity, "release record %s moved %s too, but its copy for that tag is missing from %s", lr.Digest, e.Target, t.Repository)
			}
		}
		out = append(out, c)
	}
	return out, nil
}

// resolveOrEmpty returns what repo:tag points at, "" when absent.
func resolveOrEmpty(ctx context.Context, store registry.Store, repo, tag string) (string, error) {
	d, err := store.Resolve(ctx, repo, tag)
	if errors.Is(err, registry.ErrNotFound) {
		return "", nil
	}
	if err != nil {
		return "", fmt.Errorf("resolving %s:%s: %w", repo, tag, err)
	}
	return d.Digest.String(), nil
}

// advanceUnit takes a release unit's record through its steps, from
// wherever an earlier run stopped (any process may run it, any number of
// times; every step is a compare-and-swap from the state the record
// names):
//
//  1. claim: each tag's head pointer moves, in order, from the tag's
//     previous record to its copy of the unit's record;
//  2. each tag moves, in order, from the record's "from" to its "to";
//  3. each copy gets its committed marker.
//
// A claim that finds a head pointer moved elsewhere before any tag moved
// gives the unit up: the claimed heads go back to their previous records,
// nothing visible changed, and the error is a Conflict. Once a tag moved,
// the unit only goes forward; a tag or head moved by someone else then is
// Integrity damage that names the record.
func advanceUnit(ctx context.Context, store registry.Store, sw registry.TagSwapper, copies []*unitCopy) error {
	rec := copies[0].rec
	tags := make([]string, len(copies))
	readTags := func() (moved bool, foreign string, err error) {
		for i, c := range copies {
			if tags[i], err = resolveOrEmpty(ctx, store, c.target.Repository, c.target.Tag); err != nil {
				return false, "", err
			}
			r := &c.rec.Record
			switch {
			case tags[i] == r.To && r.To != r.From:
				moved = true
			case tags[i] == r.From:
			default:
				foreign = fmt.Sprintf("%s points at %s, neither the %s it was released from nor the %s it was released to", c.target, orNone(tags[i]), orNone(r.From), r.To)
			}
		}
		return moved, foreign, nil
	}
	giveUp := func(why string) error {
		for _, c := range copies {
			if hd, err := resolveOrEmpty(ctx, store, c.target.Repository, c.headTag); err == nil && hd == c.rec.Digest.String() {
				prev, err := registry.ParseDigest(c.rec.Record.Previous)
				if err != nil {
					continue
				}
				pd, err := subjectOf(ctx, store, c.target.Repository, prev)
				if err != nil {
					continue
				}
				_ = sw.SwapTag(ctx, c.target.Repository, c.headTag, c.rec.Digest, pd)
			}
		}
		return refuse(&Refusal{Kind: errkind.Conflict, Action: "release", Problems: []string{fmt.Sprintf(
			"%s (a concurrent promote or rollback won); nothing changed, the release unit's unused record %s is harmless", why, shortHex(rec.Digest.String()))}})
	}
	broken := func(why string) error {
		return errkind.New(errkind.Integrity, "the release unit of record %s (%s) has moved some of its tags, but %s: inspect with `modelgate log %s`",
			rec.Digest, strings.Join(rec.Record.UnitTargets(), ", "), why, copies[0].target)
	}
	// 1. Claim the head pointers.
	for _, c := range copies {
		hd, err := resolveOrEmpty(ctx, store, c.target.Repository, c.headTag)
		if err != nil {
			return err
		}
		if hd == c.rec.Digest.String() {
			continue
		}
		if hd == c.rec.Record.Previous && hd != "" {
			prev, _ := registry.ParseDigest(hd)
			err := sw.SwapTag(ctx, c.target.Repository, c.headTag, prev, c.rec.Desc)
			if err == nil {
				crashPoint("claim")
				continue
			}
			if !errors.Is(err, registry.ErrConflict) {
				return fmt.Errorf("claiming the release log of %s: %w", c.target, err)
			}
			if hd, err = resolveOrEmpty(ctx, store, c.target.Repository, c.headTag); err == nil && hd == c.rec.Digest.String() {
				continue
			}
		}
		moved, _, err := readTags()
		if err != nil {
			return err
		}
		why := fmt.Sprintf("the release log of %s moved on to record %s", c.target, shortHex(hd))
		if moved {
			return broken(why)
		}
		return giveUp(why)
	}
	// 2. Every tag where the record says it was, or already moved.
	moved, foreign, err := readTags()
	if err != nil {
		return err
	}
	if foreign != "" {
		if moved {
			return broken(foreign)
		}
		return giveUp(foreign)
	}
	for i, c := range copies {
		r := &c.rec.Record
		if tags[i] == r.To {
			continue
		}
		var old v1.Hash
		if r.From != "" {
			old, _ = registry.ParseDigest(r.From)
		}
		to, _ := registry.ParseDigest(r.To)
		toDesc, err := subjectOf(ctx, store, c.target.Repository, to)
		if err != nil {
			return fmt.Errorf("the model %s released on %s: %w", r.To, c.target, err)
		}
		if err := moveMember(ctx, store, sw, c.target, old, r.From, r.To, toDesc); err != nil {
			if !errors.Is(err, errForeign) {
				return err
			}
			if !moved {
				return giveUp(fmt.Sprintf("%s: %v", c.target, err))
			}
			return broken(fmt.Sprintf("%s %v", c.target, err))
		}
		moved = true
		crashPoint("move")
	}
	// 3. Committed markers.
	for _, c := range copies {
		if committedMarked(ctx, store, c.target.Repository, c.rec.Digest.String()) {
			continue
		}
		s := &state{target: c.target, headTag: c.headTag}
		if err := markCommitted(ctx, store, s, c.rec.Desc); err != nil {
			return err
		}
		crashPoint("mark")
	}
	return nil
}

// errForeign says a member tag points neither where a release unit's
// record says it was nor where it goes.
var errForeign = errors.New("was moved by someone else")

// moveMember moves target from "from" (old) to toDesc ("to") by
// compare-and-swap. A one-tag promote or rollback that read the tag
// before the unit claimed its head may have moved it in between; that
// release then loses its own head move and puts the tag back (see
// commit), so a tag found elsewhere is read again a few times before it
// counts as moved by someone else (errForeign).
func moveMember(ctx context.Context, store registry.Store, sw registry.TagSwapper, target registry.Ref, old v1.Hash, from, to string, toDesc v1.Descriptor) error {
	now := ""
	for try := 0; try < 6; try++ {
		err := sw.SwapTag(ctx, target.Repository, target.Tag, old, toDesc)
		if err == nil {
			return nil
		}
		if !errors.Is(err, registry.ErrConflict) {
			return fmt.Errorf("moving %s: %w", target, err)
		}
		now, err = resolveOrEmpty(ctx, store, target.Repository, target.Tag)
		if err != nil {
			return err
		}
		switch now {
		case to:
			return nil
		case from:
			continue
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(time.Duration(25<<try) * time.Millisecond):
		}
	}
	return fmt.Errorf("%w (to %s) before the release could move it", errForeign, orNone(now))
}

// unitOpen reports whether the head record of s, a copy of a release
// unit's record, may still have steps to take: its tag has not moved yet,
// or its committed marker is missing.
func unitOpen(ctx context.Context, store registry.Store, s *state) bool {
	h := s.head
	if h == nil || len(h.Record.Unit) == 0 {
		return false
	}
	switch s.current() {
	case h.Record.To:
		return !committedMarked(ctx, store, s.target.Repository, h.Digest.String())
	case h.Record.From:
		return true
	}
	return false
}

// completeUnit loads and advances the release unit whose record heads s.
func completeUnit(ctx context.Context, store registry.Store, sw registry.TagSwapper, s *state) error {
	copies, err := loadUnit(ctx, store, s.head)
	if err != nil {
		return err
	}
	if err := advanceUnit(ctx, store, sw, copies); err != nil {
		if errkind.Of(err) == errkind.Conflict {
			return nil // given up: the caller reads the state again
		}
		return err
	}
	return nil
}

// PromoteUnit releases several tags together as one unit: each member is
// judged as Promote judges it (gate report against the tag's current
// target, approvals under its own policy), the coupling of encoders and
// scorers is judged in the world after the release (an encoder moves with
// every scorer that consumes it; a scorer tied to an encoder tag consumes
// what that tag will point at), one signed record names every move, and
// the tags move by compare-and-swap, scorers first (see advanceUnit and
// the package doc). Every member must already have a release log.
func PromoteUnit(ctx context.Context, store registry.Store, req UnitRequest) (*UnitResult, error) {
	if len(req.Members) < 2 {
		return nil, errkind.New(errkind.BadInput, "a release unit moves two or more tags")
	}
	sw, err := swapper(store)
	if err != nil {
		return nil, err
	}
	res := &UnitResult{}
	seen := map[string]bool{}
	var moves []move
	states := map[string]*state{}
	members := map[string]*UnitMember{}
	kinds := map[string]string{}
	var problems []problem
	var refusal Refusal
	pols := req.Policies
	for i := range req.Members {
		m := &req.Members[i]
		t := m.Target
		if err := checkTarget(t); err != nil {
			return nil, err
		}
		if seen[t.String()] {
			return nil, errkind.New(errkind.BadInput, "%s is named twice in one release", t)
		}
		seen[t.String()] = true
		if m.Policy != nil {
			pols = append(pols, m.Policy)
		}
		if _, err := subjectOf(ctx, store, t.Repository, m.Candidate); err != nil {
			return nil, fmt.Errorf("the candidate %s (it must be in repository %s): %w", m.Candidate, t.Repository, err)
		}
	}
	// Settle every member (completing interrupted releases) until a pass
	// completes nothing: completing one tag's release may move another.
	for pass := 0; ; pass++ {
		if pass == 4 {
			return nil, errkind.New(errkind.Conflict, "the release logs of these tags keep changing under us: try again")
		}
		again := false
		for i := range req.Members {
			t := req.Members[i].Target
			s, completed, err := settledState(ctx, store, sw, t, false)
			if err != nil {
				return nil, err
			}
			if completed != "" {
				res.Completed = appendNew(res.Completed, completed)
				again = true
			}
			states[t.String()] = s
		}
		if !again {
			break
		}
	}
	noop := true
	for i := range req.Members {
		noop = noop && states[req.Members[i].Target.String()].current() == req.Members[i].Candidate.String()
	}
	if noop {
		res.NoOp = true
		for i := range req.Members {
			m := &req.Members[i]
			res.Members = append(res.Members, &PromoteResult{NoOp: true, Target: m.Target.String(), From: m.Candidate.String(), To: m.Candidate.String()})
		}
		return res, nil
	}
	for i := range req.Members {
		m := &req.Members[i]
		t := m.Target
		s := states[t.String()]
		switch {
		case s.external:
			problems = append(problems, problem{errkind.Integrity, fmt.Sprintf("%s points at %s but its newest release record says %s: the tag was moved outside modelgate. Inspect with `modelgate log %s`, then `modelgate rollback %s` restores the last released model", t, orNone(s.current()), s.head.Record.To, t, t)})
		case s.head == nil:
			problems = append(problems, problem{errkind.BadInput, fmt.Sprintf("%s has no release log yet, so no bound policy: a release of several tags moves only tags that have one (a release that loses a race gives back every release log head it claimed, and a head that did not exist cannot be given back by compare-and-swap). Give %s its first release alone, which binds its policy: `modelgate promote CANDIDATE --to %s --policy FILE --key KEY` with a candidate that fits what is live now (for a scorer, one of the encoder live now), then release it with the others", t, t, t)})
		case s.current() == m.Candidate.String():
			problems = append(problems, problem{errkind.BadInput, fmt.Sprintf("%s already points at %s: leave it out of the release", t, m.Candidate)})
		}
		members[t.String()] = m
		// Each member is judged by the policy bound to its tag.
		if b, err := boundOf(ctx, store, s); err != nil {
			return nil, err
		} else if b.Legacy {
			problems = append(problems, problem{errkind.Unauthorized, fmt.Sprintf("%s has a release log from before policies were bound to tags: bind its policy first (`modelgate policy bind %s --policy FILE --key KEY`)", t, t)})
		} else if pol, err := choosePolicy(b, t, m.Policy, "release"); err != nil {
			var rf *Refusal
			if !errors.As(err, &rf) {
				return nil, err
			}
			for _, p := range rf.Problems {
				problems = append(problems, problem{rf.Kind, t.String() + ": " + p})
			}
		} else {
			if m.Policy == nil {
				pols = append(pols, pol)
			}
			m.Policy = pol
			if rule, err := pol.Rule(t.String()); err == nil {
				if msg := releaserCheck(rule, KindPromote, req.Key); msg != "" {
					problems = append(problems, problem{errkind.Unauthorized, msg})
				}
			}
		}
		if m.Policy == nil {
			continue
		}
		mv, err := newMove(ctx, store, t, m.Candidate, m.CandidateName, s.current(), m.Policy)
		if err != nil {
			return nil, err
		}
		kinds[t.String()] = mv.info.kind
		moves = append(moves, mv)
	}
	if len(problems) > 0 {
		return res, refuseProblems("release", problems)
	}
	coupling, err := couplingProblems(ctx, store, moves, pols)
	if err != nil {
		return nil, err
	}
	problems = append(problems, coupling...)
	now := nowUTC(req.Now)
	order := moveOrder(kinds, mapKeys(members))
	rec := &Record{Kind: KindPromote, Reason: req.Reason, By: whoUnsigned(req.User), Time: now.Format(time.RFC3339)}
	released := map[string][]string{}
	for _, target := range order {
		m, s := members[target], states[target]
		var promoter promoterID
		if req.Key != nil {
			promoter.id = req.Key.ID
			if rule, err := m.Policy.Rule(target); err == nil {
				promoter.names, _ = promoterIdentity(rule, req.Key.Public)
			}
		}
		j, err := judge(ctx, store, m.Candidate.String(), m.Target, m.Policy, s.current(), promoter, now, judgePromote)
		if err != nil {
			return nil, err
		}
		r := &PromoteResult{Target: target, From: s.current(), To: m.Candidate.String(), Reports: j.Reports, Approvals: j.Approvals, Required: j.Required}
		res.Members = append(res.Members, r)
		refusal.Reports = append(refusal.Reports, j.Reports...)
		refusal.Approvals = append(refusal.Approvals, j.Approvals...)
		for _, p := range j.Problems {
			problems = append(problems, problem{j.Kind, target + ": " + p})
		}
		if len(j.Problems) > 0 {
			continue
		}
		r.Report = j.Report.Digest
		var approvals []string
		for _, a := range j.Approvals {
			if a.Counted {
				approvals = append(approvals, a.Digest)
			}
		}
		sort.Strings(approvals)
		list, err := s.head.releasedList(ctx, store, m.Target.Repository)
		if err != nil {
			return nil, err
		}
		released[target] = appendNew(list, r.To)
		rec.Unit = append(rec.Unit, UnitEntry{Target: target, From: s.current(), To: r.To, Report: r.Report, Approvals: approvals,
			PolicyDigest: m.Policy.Digest(), Policy: m.Policy.Digest(), Previous: s.head.Digest.String(),
			Restore: &Restore{Target: s.current(), Record: s.head.Digest.String()}})
	}
	if len(problems) > 0 {
		err := refuseProblems("release", problems)
		var rf *Refusal
		if errors.As(err, &rf) {
			rf.Reports, rf.Approvals = refusal.Reports, refusal.Approvals
		}
		return res, err
	}
	for _, e := range rec.Unit {
		m := members[e.Target]
		rule, _ := m.Policy.Rule(e.Target)
		if err := noteConsumer(ctx, store, m.Target, e.To, rule); err != nil {
			return res, err
		}
	}
	digests, statement, err := commitUnit(ctx, store, sw, rec, released, nil, req.Key, nil)
	for i, d := range digests {
		res.Members[i].Record = d
	}
	res.Statement = statement
	return res, err
}

// commitUnit writes the unit's record and advances it; it returns the
// digests of the record's copies (in Unit order) and of its statement.
// before, when not nil, runs once the copies are written and before any
// head pointer or tag moves.
func commitUnit(ctx context.Context, store registry.Store, sw registry.TagSwapper, rec *Record, released map[string][]string, reuse map[string]v1.Descriptor, key *Key, before func(digests []string) error) ([]string, string, error) {
	descs, err := writeUnitRecord(ctx, store, rec, released, reuse, key)
	if err != nil {
		return nil, "", fmt.Errorf("writing the release record: %w", err)
	}
	var copies []*unitCopy
	var digests []string
	statement := ""
	for i, e := range rec.Unit {
		t, _ := registry.ParseRef(e.Target, false)
		lr, err := readRecord(ctx, store, t.Repository, descs[i].Digest, e.Target)
		if err != nil {
			return nil, "", fmt.Errorf("reading back the release record: %w", err)
		}
		ht, _ := headTag(t.Tag)
		copies = append(copies, &unitCopy{target: t, headTag: ht, rec: lr})
		digests = append(digests, descs[i].Digest.String())
		statement = lr.envelope.Digest.String()
	}
	if before != nil {
		if err := before(digests); err != nil {
			return digests, statement, err
		}
	}
	return digests, statement, advanceUnit(ctx, store, sw, copies)
}

// refuseProblems makes a refusal of ps, its kind the gravest.
func refuseProblems(action string, ps []problem) error {
	r := &Refusal{Action: action}
	for _, p := range ps {
		r.Problems = append(r.Problems, p.text)
		if r.Kind == 0 || rank(p.kind) > rank(r.Kind) {
			r.Kind = p.kind
		}
	}
	return refuse(r)
}

func mapKeys[V any](m map[string]V) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

// rollbackUnit rolls back the release unit whose record heads s (the
// state of one of its tags): every tag it moved goes back to what that
// record's undo names, as one new unit record. Every tag must still point
// where the unit left it.
func rollbackUnit(ctx context.Context, store registry.Store, sw registry.TagSwapper, s *state, req RollbackRequest, res *RollbackResult) (*RollbackResult, error) {
	h := s.head
	targets := h.Record.UnitTargets()
	if req.To != nil {
		return res, refuse(&Refusal{Kind: errkind.BadInput, Action: "rollback", Problems: []string{fmt.Sprintf(
			"the newest release of %s moved %s together (record %s): `modelgate rollback %s` without --to rolls them back together",
			s.target, strings.Join(targets, ", "), shortHex(h.Digest.String()), s.target)}})
	}
	copies, err := loadUnit(ctx, store, h)
	if err != nil {
		return nil, err
	}
	rec := &Record{Kind: KindRollback, Reason: req.Reason, By: whoUnsigned(req.User), Time: nowUTC(req.Now).Format(time.RFC3339)}
	reuse := map[string]v1.Descriptor{}
	var problems, unauthorized []string
	for _, c := range copies {
		r := &c.rec.Record
		cs := s
		if c.target.String() != s.target.String() {
			if cs, _, err = settledState(ctx, store, sw, c.target, req.DryRun); err != nil {
				return nil, err
			}
		}
		if (cs.current() != r.To && !(req.DryRun && cs.unitOpen)) || cs.head == nil {
			problems = append(problems, fmt.Sprintf("%s points at %s now, not at the %s the release unit left it at: roll back %s first (`modelgate rollback %s`)",
				c.target, orNone(cs.current()), r.To, c.target, c.target))
			continue
		}
		if r.Restore == nil {
			return res, refuse(&Refusal{Kind: errkind.BadInput, Action: "rollback", Problems: []string{fmt.Sprintf(
				"nothing earlier to roll back to: the release unit of record %s left %s at its first release", shortHex(h.Digest.String()), c.target)}})
		}
		var restore *Restore
		if r.Restore.Record != "" {
			d, err := registry.ParseDigest(r.Restore.Record)
			if err != nil {
				return nil, errkind.New(errkind.Integrity, "release record %s names a malformed record to restore", c.rec.Digest)
			}
			prev, err := readRecord(ctx, store, c.target.Repository, d, c.target.String())
			if err != nil {
				return nil, fmt.Errorf("reading the record to restore for %s: %w", c.target, err)
			}
			if prev.Record.To != r.Restore.Target {
				return nil, errkind.New(errkind.Integrity, "release record %s says undoing it restores %s as of record %s, but that record released %s", c.rec.Digest, r.Restore.Target, d, prev.Record.To)
			}
			restore = prev.Record.Restore
		}
		// Each member's own bound policy says who may roll it back.
		if c.target.String() != s.target.String() {
			b, err := boundOf(ctx, store, cs)
			if err != nil {
				return nil, err
			}
			if b.Policy != nil {
				rule, err := b.Policy.Rule(c.target.String())
				if err != nil {
					return nil, errkind.New(errkind.Integrity, "the policy bound to %s has no rule for it: %v", c.target, err)
				}
				if msg := releaserCheck(rule, KindRollback, req.Key); msg != "" {
					unauthorized = append(unauthorized, msg)
				}
			}
		}
		// The rollback ends the gate reports and approvals of the model
		// it takes each tag away from.
		ended, err := releaseEvidence(ctx, store, c.target.Repository, r.To, c.target.String())
		if err != nil {
			return nil, err
		}
		rec.Unit = append(rec.Unit, UnitEntry{Target: c.target.String(), From: r.To, To: r.Restore.Target,
			Previous: cs.head.Digest.String(), Restore: restore, Policy: cs.head.Record.Policy, PolicyDigest: cs.head.Record.Policy,
			Ended: ended})
		reuse[c.target.String()] = cs.head.released
		res.With = append(res.With, UnitMove{Target: c.target.String(), From: r.To, To: r.Restore.Target})
	}
	if len(unauthorized) > 0 {
		return res, refuse(&Refusal{Kind: errkind.Unauthorized, Action: "rollback", Problems: unauthorized})
	}
	if len(problems) > 0 {
		return res, refuse(&Refusal{Kind: errkind.Conflict, Action: "rollback", Problems: append([]string{fmt.Sprintf(
			"the newest release of %s moved %s together (record %s), so rolling it back rolls them all back",
			s.target, strings.Join(targets, ", "), shortHex(h.Digest.String()))}, problems...)})
	}
	for _, e := range rec.Unit {
		if e.Target == s.target.String() {
			res.To = e.To
			if e.Restore != nil {
				res.Earlier = e.Restore.Target
			}
		}
	}
	if req.DryRun {
		return res, nil
	}
	for _, c := range copies {
		var rule *policy.Rule
		if b, err := boundOf(ctx, store, &state{target: c.target, head: c.rec}); err == nil && b.Policy != nil {
			rule, _ = b.Policy.Rule(c.target.String())
		}
		if err := noteConsumer(ctx, store, c.target, c.rec.Record.Restore.Target, rule); err != nil {
			return res, err
		}
	}
	// Ended markers go in before any tag moves (see ended.go): a
	// rollback that stops half way may end approvals, never leave them
	// counting.
	endMarkers := func(digests []string) error {
		for i, e := range rec.Unit {
			if len(e.Ended) == 0 {
				continue
			}
			t, _ := registry.ParseRef(e.Target, false)
			m := EndedRelease{Target: e.Target, Model: e.From, Record: digests[i], Reason: req.Reason, By: rec.By.String(), Time: rec.Time, Ended: e.Ended}
			if err := writeEnded(ctx, store, t.Repository, m); err != nil {
				return fmt.Errorf("ending the approvals of %s on %s: %w", e.From, e.Target, err)
			}
		}
		return nil
	}
	digests, statement, err := commitUnit(ctx, store, sw, rec, nil, reuse, req.Key, endMarkers)
	for i, e := range rec.Unit {
		if e.Target == s.target.String() && i < len(digests) {
			res.Record = digests[i]
		}
	}
	res.Statement = statement
	return res, err
}

// UnitMove is one tag a release unit moves.
type UnitMove struct {
	Target string `json:"target"`
	From   string `json:"from"`
	To     string `json:"to"`
}
