package release

import (
	"context"
	"crypto/x509"
	"encoding/json"
	"encoding/pem"
	"errors"
	"fmt"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// Kinds of release record.
const (
	// KindInitial records a tag's first target set by a setup step
	// (the demo) without a gate.
	KindInitial = "initial"
	// KindPromote records a promotion through the gate and approvals.
	KindPromote = "promote"
	// KindRollback records a rollback.
	KindRollback = "rollback"
	// KindPolicy records a change of the policy bound to the tag; the tag
	// does not move (From = To).
	KindPolicy = "policy"
)

// MediaTypeReleased is the media type of a record's released index.
const MediaTypeReleased types.MediaType = "application/vnd.modelgate.released.v1+json"

// HeadTagPrefix starts the tag that points at a tag's newest release
// record: the head pointer of "prod" is "release-prod", in the same
// repository. Tags with this prefix cannot be promoted to.
const HeadTagPrefix = registry.ReleaseHeadPrefix

// Record is the predicate of a release record statement; the statement's
// subject is the model the record released (To).
type Record struct {
	Kind string `json:"kind"`
	// Target is NAME:TAG.
	Target string `json:"target"`
	// From is what the tag pointed at before ("" when it did not exist).
	From string `json:"from,omitempty"`
	// To is what the tag points at after.
	To string `json:"to"`
	// Report is the gate report a promotion used.
	Report string `json:"gateReport,omitempty"`
	// Approvals are the approvals a promotion counted, sorted.
	Approvals []string `json:"approvals,omitempty"`
	// PolicyDigest is the policy the change was judged under: for a
	// promotion the policy of its gate report and approvals, for a policy
	// change the policy it replaced ("" for the first).
	PolicyDigest string `json:"policyDigest,omitempty"`
	// Policy is the digest of the canonical form of the policy bound to
	// the tag after this record, carried as a layer of the record; "" in
	// records made before policies were bound to tags.
	Policy string `json:"policy,omitempty"`
	// Ended lists, for a rollback, the gate reports and approvals it
	// ended: those of the models it took the tag away from, sorted.
	Ended  []string `json:"ended,omitempty"`
	Reason string   `json:"reason,omitempty"`
	// By is who made the change; SignerPublicKey is their PEM public key
	// (empty for an unsigned record).
	By              Actor  `json:"by"`
	SignerPublicKey string `json:"signerPublicKey,omitempty"`
	// Time is when (RFC 3339, UTC).
	Time string `json:"time"`
	// Previous is the manifest digest of the tag's previous record, ""
	// for the first.
	Previous string `json:"previous,omitempty"`
	// Restore is what rolling this record back restores; nil when nothing
	// is earlier.
	Restore *Restore `json:"restore,omitempty"`
	// Released is the digest of the released-index blob: every digest
	// released on the tag up to and including this record.
	Released string `json:"released"`
	// External is true when the tag had been moved outside modelgate
	// (From is not the previous record's To) and this record repairs it.
	External bool   `json:"external,omitempty"`
	Tool     string `json:"tool"`
	// Unit, on the record of a release that moved several tags together
	// (a release unit), lists every tag it moved, in the order it moved
	// them; nil on a one-tag record. The signed record is one statement
	// about all of them; each tag's log holds a copy (its own manifest in
	// that tag's repository), read as the entry of that tag: the fields
	// above are then that entry's (on the statement itself, Unit[0]'s).
	Unit []UnitEntry `json:"unit,omitempty"`
}

// UnitEntry is one tag a release unit moved: the per-tag fields of a
// Record.
type UnitEntry struct {
	Target       string   `json:"target"`
	From         string   `json:"from,omitempty"`
	To           string   `json:"to"`
	Report       string   `json:"gateReport,omitempty"`
	Approvals    []string `json:"approvals,omitempty"`
	PolicyDigest string   `json:"policyDigest,omitempty"`
	Previous     string   `json:"previous,omitempty"`
	Restore      *Restore `json:"restore,omitempty"`
	Released     string   `json:"released"`
	// Policy is the tag's bound policy after the release (see
	// Record.Policy); its copy of the record carries it as a layer.
	Policy string `json:"policy,omitempty"`
	// Ended lists, for a rollback, the gate reports and approvals it
	// ended on this tag (see Record.Ended).
	Ended []string `json:"ended,omitempty"`
}

// entryOf returns the per-tag fields of a one-tag record.
func (r *Record) entryOf() UnitEntry {
	return UnitEntry{Target: r.Target, From: r.From, To: r.To, Report: r.Report, Approvals: r.Approvals,
		PolicyDigest: r.PolicyDigest, Previous: r.Previous, Restore: r.Restore, Released: r.Released, Policy: r.Policy, Ended: r.Ended}
}

// project sets the per-tag fields from e.
func (r *Record) project(e UnitEntry) {
	r.Target, r.From, r.To, r.Report, r.Approvals = e.Target, e.From, e.To, e.Report, e.Approvals
	r.PolicyDigest, r.Previous, r.Restore, r.Released = e.PolicyDigest, e.Previous, e.Restore, e.Released
	r.Policy, r.Ended = e.Policy, e.Ended
}

// UnitTargets returns the targets a record moved: its Unit's, or its own.
func (r *Record) UnitTargets() []string {
	if len(r.Unit) == 0 {
		return []string{r.Target}
	}
	out := make([]string, len(r.Unit))
	for i, e := range r.Unit {
		out[i] = e.Target
	}
	return out
}

// Restore says what undoing a record does: point the tag at Target, after
// which the tag is in the state of record Record ("" when that state has
// no record: the tag was set before its first record).
type Restore struct {
	Target string `json:"target"`
	Record string `json:"record,omitempty"`
}

// releasedIndex is the released-index blob.
type releasedIndex struct {
	Target   string   `json:"target"`
	Released []string `json:"released"`
}

// loadedRecord is a record read from the store and checked on its own:
// envelope, signature against the key it carries, statement.
type loadedRecord struct {
	Digest   v1.Hash
	Desc     v1.Descriptor
	Record   Record
	Signed   bool
	Signer   *PublicKey // the verified signer, nil when unsigned
	released v1.Descriptor
	// envelope is the signed statement's layer: the same blob in every
	// copy of a release unit's record.
	envelope v1.Descriptor
	policy   *v1.Descriptor // the bound policy's layer, nil when none
	st       *stored
}

// writeRecord signs rec with key (nil: unsigned), stores it with its
// released index, subject = the To model, and returns its descriptor. The
// index is released, or, when reuse is not nil, the index blob reuse
// names, already in the store. pol, when not nil, is the bound policy's
// canonical blob, carried as a layer; rec.Policy must be its digest.
func writeRecord(ctx context.Context, store registry.Store, repo string, rec *Record, released []string, reuse *v1.Descriptor, key *Key, pol *artifact.Blob) (v1.Descriptor, error) {
	var idxBlob artifact.Blob
	if reuse != nil {
		idxBlob = artifact.Blob{Desc: *reuse}
	} else {
		idx, err := json.Marshal(releasedIndex{Target: rec.Target, Released: released})
		if err != nil {
			return v1.Descriptor{}, err
		}
		idxBlob = artifact.NewBlob(MediaTypeReleased, idx, map[string]string{artifact.AnnotationTitle: "released.json"})
	}
	rec.Released = idxBlob.Desc.Digest.String()
	rec.Tool = toolVersion()
	if (pol == nil) != (rec.Policy == "") || (pol != nil && pol.Desc.Digest.String() != rec.Policy) {
		return v1.Descriptor{}, errkind.New(errkind.Internal, "release record of %s: policy layer and policy digest %q disagree", rec.Target, rec.Policy)
	}
	if key != nil {
		rec.By = Actor{Name: key.Name, KeyID: key.ID}
		der, _ := x509.MarshalPKIXPublicKey(key.Public)
		rec.SignerPublicKey = string(pem.EncodeToMemory(&pem.Block{Type: "PUBLIC KEY", Bytes: der}))
	}
	to, err := registry.ParseDigest(rec.To)
	if err != nil {
		return v1.Descriptor{}, err
	}
	subject, err := subjectOf(ctx, store, repo, to)
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("the released model %s: %w", rec.To, err)
	}
	st, err := newStatement(repo, rec.To, PredicateRelease, rec)
	if err != nil {
		return v1.Descriptor{}, err
	}
	env, err := Sign(ctx, key, st)
	if err != nil {
		return v1.Descriptor{}, err
	}
	ann := map[string]string{
		artifact.AnnotationCreated: rec.Time,
		AnnotationTarget:           rec.Target,
		AnnotationKind:             rec.Kind,
		AnnotationPrevious:         rec.Previous,
		AnnotationFrom:             rec.From,
	}
	if key != nil {
		ann[AnnotationSigner] = key.ID
	}
	layers := []artifact.Blob{
		artifact.NewBlob(MediaTypeEnvelope, env, map[string]string{artifact.AnnotationTitle: "release.dsse.json"}),
		idxBlob,
	}
	if pol != nil {
		layers = append(layers, *pol)
	}
	return putArtifact(ctx, store, repo, ArtifactTypeRelease, layers, subject, ann)
}

// readRecord reads repo@d and checks it on its own: a release artifact, a
// release statement about its To for target, signed by the key it carries
// (or unsigned and claiming no key). Any failure is errkind.Integrity.
func readRecord(ctx context.Context, store registry.Store, repo string, d v1.Hash, target string) (*loadedRecord, error) {
	s, err := readSigned(ctx, store, repo, d, ArtifactTypeRelease)
	if err != nil {
		return nil, err
	}
	lr := &loadedRecord{Digest: d, Desc: s.Art.Desc, st: s, Signed: s.Envelope.Signed()}
	bad := func(format string, args ...any) error {
		return errkind.New(errkind.Integrity, "release record %s: %s", d, fmt.Sprintf(format, args...))
	}
	st := &s.Envelope.Statement
	if st.PredicateType != PredicateRelease {
		return nil, bad("predicate type %q is not a release record", st.PredicateType)
	}
	if err := json.Unmarshal(st.Predicate, &lr.Record); err != nil {
		return nil, bad("malformed predicate: %v", err)
	}
	rec := &lr.Record
	if len(rec.Unit) > 0 {
		if err := checkUnit(rec); err != nil {
			return nil, bad("%v", err)
		}
		found := false
		for _, e := range rec.Unit {
			if e.Target == target {
				rec.project(e)
				found = true
			}
		}
		if !found {
			return nil, bad("it is a record of %s, not %s", strings.Join(rec.UnitTargets(), ", "), target)
		}
		if a := s.Art.Manifest.Annotations; a[AnnotationTarget] != target {
			return nil, bad("its copy for %s is annotated as %s's", target, a[AnnotationTarget])
		}
	}
	if rec.Target != target {
		return nil, bad("it is a record of %s, not %s", rec.Target, target)
	}
	if !st.About(rec.To) || s.Art.Manifest.Subject == nil || s.Art.Manifest.Subject.Digest.String() != rec.To {
		return nil, bad("its statement or manifest subject is not the model it released (%s)", rec.To)
	}
	switch rec.Kind {
	case KindInitial, KindPromote, KindRollback, KindPolicy:
	default:
		return nil, bad("unknown kind %q", rec.Kind)
	}
	if lr.Signed {
		pub, err := policy.ParsePublicKey([]byte(rec.SignerPublicKey))
		if err != nil {
			return nil, bad("signed, but the signer's public key in it is unusable: %v", err)
		}
		pk := PublicKey{Name: rec.By.Name, ID: KeyID(pub), Public: pub}
		if pk.ID != rec.By.KeyID {
			return nil, bad("by key %s, but the public key in it has id %s", rec.By.KeyID, pk.ID)
		}
		if len(s.Envelope.VerifiedBy(ctx, []PublicKey{pk})) == 0 {
			return nil, bad("the signature of %s does not verify: the record was altered or forged", rec.By)
		}
		lr.Signer = &pk
	} else if rec.By.KeyID != "" || rec.SignerPublicKey != "" {
		return nil, bad("it names signing key %s but carries no signature", rec.By.KeyID)
	}
	ld, ok := s.layer(MediaTypeReleased)
	if !ok || ld.Digest.String() != rec.Released {
		return nil, bad("its released index layer is missing or is not the one it names (%s)", rec.Released)
	}
	lr.released = ld
	lr.envelope, _ = s.layer(MediaTypeEnvelope)
	pd, ok := s.layer(MediaTypePolicy)
	switch {
	case rec.Policy == "" && ok:
		return nil, bad("it carries a policy layer but names no bound policy")
	case rec.Policy != "" && (!ok || pd.Digest.String() != rec.Policy):
		return nil, bad("its bound policy layer is missing or is not the one it names (%s)", rec.Policy)
	case ok:
		lr.policy = &pd
	}
	if rec.Kind == KindPolicy && (rec.From != rec.To || rec.Policy == "") {
		return nil, bad("a policy record must leave the tag where it was and name the policy it binds")
	}
	return lr, nil
}

// checkUnit checks a release unit's statement-level rules: two or more
// distinct targets, the first of which the record's own fields repeat.
func checkUnit(rec *Record) error {
	if len(rec.Unit) < 2 {
		return fmt.Errorf("a release unit of %d tag(s)", len(rec.Unit))
	}
	seen := map[string]bool{}
	for _, e := range rec.Unit {
		if seen[e.Target] {
			return fmt.Errorf("its release unit names %s twice", e.Target)
		}
		seen[e.Target] = true
	}
	first, _ := json.Marshal(rec.Unit[0])
	own, _ := json.Marshal(rec.entryOf())
	if string(first) != string(own) {
		return fmt.Errorf("its own fields are not its release unit's first entry")
	}
	return nil
}

// releasedList reads the record's released index.
func (lr *loadedRecord) releasedList(ctx context.Context, store registry.Store, repo string) ([]string, error) {
	b, err := artifact.ReadBlob(ctx, store, repo, lr.released, 64<<20)
	if err != nil {
		return nil, fmt.Errorf("release record %s: released index: %w", lr.Digest, err)
	}
	var idx releasedIndex
	if err := json.Unmarshal(b, &idx); err != nil || idx.Target != lr.Record.Target {
		return nil, errkind.New(errkind.Integrity, "release record %s: malformed released index", lr.Digest)
	}
	return idx.Released, nil
}

// headTag returns the head pointer tag of tag.
func headTag(tag string) (string, error) {
	h := HeadTagPrefix + tag
	if err := registry.ValidateTag(h); err != nil {
		return "", errkind.New(errkind.BadInput, "tag %q is too long to keep a release log (its head pointer %q would be over 128 characters)", tag, h)
	}
	return h, nil
}

// checkTarget refuses targets modelgate cannot keep a log for.
func checkTarget(t registry.Ref) error {
	if t.Tag == "" || t.HasDigest() {
		return errkind.New(errkind.BadInput, "target %q: want NAME:TAG", t.String())
	}
	if registry.IsReservedTag(t.Tag) {
		return registry.CheckTagName(t.Tag)
	}
	_, err := headTag(t.Tag)
	return err
}

// state is a tag and its release log head, read together.
type state struct {
	target   registry.Ref
	headTag  string
	tagDesc  *v1.Descriptor // nil: the tag does not exist
	head     *loadedRecord  // nil: no release log
	external bool           // the tag disagrees with the head record
	// pending is a record that moved the tag but whose head pointer move
	// did not happen (a crash, or a promote still in flight).
	pending *loadedRecord
	// unitOpen: the head record is a release unit's that may still have
	// steps to take (see advanceUnit).
	unitOpen bool
}

// current returns the tag's target digest, "" when absent.
func (s *state) current() string {
	if s.tagDesc == nil {
		return ""
	}
	return s.tagDesc.Digest.String()
}

func (s *state) headDigest() v1.Hash {
	if s.head == nil {
		return v1.Hash{}
	}
	return s.head.Digest
}

// readState reads the head pointer, the head record and the tag, and, when
// they disagree, looks for a pending record. It changes nothing.
func readState(ctx context.Context, store registry.Store, target registry.Ref) (*state, error) {
	ht, err := headTag(target.Tag)
	if err != nil {
		return nil, err
	}
	s := &state{target: target, headTag: ht}
	repo := target.Repository
	hd, err := store.Resolve(ctx, repo, ht)
	switch {
	case errors.Is(err, registry.ErrNotFound):
	case err != nil:
		return nil, fmt.Errorf("reading the release log head %s:%s: %w", repo, ht, err)
	default:
		s.head, err = readRecord(ctx, store, repo, hd.Digest, target.String())
		if err != nil {
			return nil, fmt.Errorf("reading the newest release record of %s: %w", target, err)
		}
	}
	td, err := store.Resolve(ctx, repo, target.Tag)
	switch {
	case errors.Is(err, registry.ErrNotFound):
	case err != nil:
		return nil, fmt.Errorf("resolving %s: %w", target, err)
	default:
		s.tagDesc = &td
	}
	if unitOpen(ctx, store, s) {
		s.unitOpen = true
		return s, nil
	}
	if s.head != nil && s.head.Record.To != s.current() {
		s.pending = findPending(ctx, store, s)
		s.external = s.pending == nil
	}
	return s, nil
}

// findPending looks among the release records whose subject is the tag's
// target for one whose previous record is the head and that moved the tag
// from the head's target to the current one. One Referrers call.
func findPending(ctx context.Context, store registry.Store, s *state) *loadedRecord {
	if s.tagDesc == nil {
		return nil
	}
	repo := s.target.Repository
	descs, err := store.Referrers(ctx, repo, s.tagDesc.Digest, ArtifactTypeRelease)
	if err != nil {
		return nil
	}
	for _, d := range descs {
		if a := d.Annotations; a != nil && (a[AnnotationPrevious] != s.head.Digest.String() || a[AnnotationTarget] != s.target.String()) {
			continue
		}
		lr, err := readRecord(ctx, store, repo, d.Digest, s.target.String())
		if err != nil {
			continue
		}
		r := lr.Record
		if r.Previous == s.head.Digest.String() && r.From == s.head.Record.To && r.To == s.current() {
			return lr
		}
	}
	return nil
}

// complete moves the head pointer to a pending record (finishing an
// interrupted promote or rollback). Losing that race to another helper is
// fine: the state is re-read by the caller.
func complete(ctx context.Context, store registry.Store, sw registry.TagSwapper, s *state) error {
	err := sw.SwapTag(ctx, s.target.Repository, s.headTag, s.head.Digest, s.pending.Desc)
	if err != nil && !errors.Is(err, registry.ErrConflict) {
		return fmt.Errorf("completing the interrupted release %s: %w", s.pending.Digest, err)
	}
	return nil
}

// settledState reads the state and completes a pending record first, so
// the head record describes the tag (or the tag was moved externally).
func settledState(ctx context.Context, store registry.Store, sw registry.TagSwapper, target registry.Ref, dryRun bool) (*state, string, error) {
	helped := ""
	for range 4 {
		s, err := readState(ctx, store, target)
		if err != nil {
			return nil, "", err
		}
		if (s.pending == nil && !s.unitOpen) || dryRun {
			return s, helped, nil
		}
		if s.unitOpen {
			helped = s.head.Digest.String()
			if err := completeUnit(ctx, store, sw, s); err != nil {
				return nil, "", err
			}
			continue
		}
		helped = s.pending.Digest.String()
		if err := complete(ctx, store, sw, s); err != nil {
			return nil, "", err
		}
	}
	return nil, "", errkind.New(errkind.Conflict, "the release log of %s keeps changing under us: try again", target)
}

// swapper returns the store's compare-and-swap, or refuses: modelgate
// never moves a release tag without one.
func swapper(store registry.Store) (registry.TagSwapper, error) {
	sw, ok := store.(registry.TagSwapper)
	if !ok {
		return nil, errkind.New(errkind.BadInput, "store %s cannot compare-and-swap tags: promote and rollback refuse to move a tag without it", store)
	}
	return sw, nil
}

func nowUTC(t time.Time) time.Time {
	if t.IsZero() {
		t = time.Now()
	}
	return t.UTC()
}

func whoUnsigned(user string) Actor {
	if user == "" {
		user = "unknown"
	}
	return Actor{Name: user}
}
