package release

import (
	"context"
	"errors"
	"fmt"
	"sort"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"modelgate/internal/artifact"
	"modelgate/internal/errkind"
	"modelgate/internal/registry"
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

	// Oldest to newest: continuity, released index, rollbacks, restores.
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
