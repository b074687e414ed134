// Package retain decides what a store may lose: the mark phase of
// modelgate's collector. Mark walks from the roots (every tag that has
// not expired, every release log and record, whatever a policy names) to
// the complete set of manifests and blobs to keep, and lists everything
// else with the reason it may go. Sweep removes what a plan lists.
//
// What is never eligible, whatever the policy's retention says:
//   - every release record and marker of one (committed, ended), and,
//     transitively, everything a kept artifact names by digest or is the
//     subject of, and every referrer of a kept artifact: so the models a
//     release moved, their gate reports, approvals, freeze records,
//     consumer markers, the bound policy, and the holdouts those name;
//   - every tag a policy names (rule targets, holdouts, encoder tags) in
//     the given policy or the policy bound to a guarded tag;
//   - every release log head pointer (release-TAG) and every tag with a
//     release log, and what they point at;
//   - everything in a repository no retention entry names;
//   - every manifest and blob younger than the grace period, or whose
//     age the store cannot tell.
//
// "Names by digest" is read without knowing each format's fields: the
// collector reads every small JSON layer of a kept artifact (a DSSE
// envelope's statement decoded first, by the release package's reader)
// and keeps every manifest or blob of the store whose digest appears in
// it. That reading keeps more than needed at worst; it cannot miss a
// reference a later version of a format adds.
package retain

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"regexp"
	"sort"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

// Reasons an item is eligible, as Plan groups them.
const (
	// ReasonOldCandidate: a model no tag, release or reference keeps,
	// older than the grace period and not among the repository's newest
	// keepCandidates.
	ReasonOldCandidate = "old-candidate"
	// ReasonExpiredTag: a tag whose pattern expired (removed), or the
	// artifact only such a tag kept.
	ReasonExpiredTag = "expired-tag"
	// ReasonReferrerOfEligible: a report, approval or other referrer
	// whose subject is eligible.
	ReasonReferrerOfEligible = "referrer-of-eligible"
	// ReasonUnreferenced: an untagged artifact that is not a model and
	// that nothing kept names (a holdout pushed without a tag, a marker
	// left by a crash).
	ReasonUnreferenced = "unreferenced"
	// ReasonUnreferencedBlob: a blob no manifest references (left by an
	// interrupted push, or by an earlier collection's removed manifests).
	ReasonUnreferencedBlob = "unreferenced-blob"
)

// Reasons an item is kept, as Plan counts them.
const (
	KeepTagged        = "tagged"
	KeepReleaseLog    = "release-log"
	KeepNamed         = "named-by-kept"
	KeepReferrer      = "referrer-of-kept"
	KeepSubject       = "subject-of-kept"
	KeepCandidates    = "newest-candidates"
	KeepYoung         = "younger-than-grace"
	KeepAgeUnknown    = "age-unknown"
	KeepNoRule        = "no-retention-rule"
	KeepPolicy        = "named-by-policy"
	KeepBlobOfKept    = "blob-of-kept"
	KeepBlobYoung     = "blob-younger-than-grace"
	KeepBlobAgeUnkown = "blob-age-unknown"
)

// Options tune Mark.
type Options struct {
	// Now is the clock's reading (the zero time: time.Now()).
	Now time.Time
	// Blobs lists the store's content blobs with their modification
	// times, for the unreferenced ones; nil when the store cannot list
	// blobs (then only blobs of eligible manifests are considered, and
	// only when Sweep can remove them).
	Blobs []StoredBlob
	// Progress, when not nil, hears of each manifest read.
	Progress func(phase, name string, done int64)
}

// StoredBlob is a blob a store lists.
type StoredBlob struct {
	Digest   v1.Hash
	Size     int64
	Modified time.Time
	// Version is the store's version of it (registry.BlobInfo's).
	Version string
}

// Tag is a tag the plan removes.
type Tag struct {
	Repository string `json:"repository"`
	Tag        string `json:"tag"`
	Target     string `json:"target"`
	Reason     string `json:"reason"`
	// Age is how old the tagged artifact is (by the time the store wrote
	// it), a Go duration.
	Age string `json:"age"`
}

// Manifest is a manifest the plan removes.
type Manifest struct {
	Repository   string `json:"repository"`
	Digest       string `json:"digest"`
	Size         int64  `json:"size"`
	ArtifactType string `json:"artifactType,omitempty"`
	Subject      string `json:"subject,omitempty"`
	Reason       string `json:"reason"`
	// Time is when the store wrote it (RFC 3339), "" when unknown.
	Time string `json:"time,omitempty"`

	// version is the store's version of it when marked: Sweep removes it
	// only while it is still that version ("": unconditionally).
	version string
}

// Blob is a blob the plan removes.
type Blob struct {
	// Repository is one repository whose manifests referenced the blob
	// (for an unreferenced blob, any repository: the stores that list
	// blobs share them between repositories).
	Repository string `json:"repository"`
	Digest     string `json:"digest"`
	Size       int64  `json:"size"`
	Reason     string `json:"reason"`

	// version is as Manifest's.
	version string
}

// Group totals one reason.
type Group struct {
	Reason    string `json:"reason"`
	Tags      int    `json:"tags"`
	Manifests int    `json:"manifests"`
	Blobs     int    `json:"blobs"`
	// Bytes are the manifests' and blobs' bytes.
	Bytes int64 `json:"bytes"`
}

// Plan is what Mark found: what to remove, in the order Sweep removes it
// (tags, then referrers before their subjects, then the other manifests,
// then blobs), and what it keeps.
type Plan struct {
	Store string `json:"store"`
	// Now is the time the plan was made for.
	Now   time.Time `json:"now"`
	Grace string    `json:"grace"`
	// Retention is false when the policy has no retention section:
	// nothing is eligible.
	Retention bool       `json:"retention"`
	Tags      []Tag      `json:"tags"`
	Manifests []Manifest `json:"manifests"`
	Blobs     []Blob     `json:"blobs"`
	Groups    []Group    `json:"groups"`
	// Bytes is the total of the eligible manifests' and blobs' bytes.
	Bytes int64 `json:"bytes"`
	// Kept counts the manifests and blobs kept, by the first reason
	// found for each.
	Kept Kept `json:"kept"`
	// Notes say what the plan could not consider (a store that cannot
	// list blobs, say).
	Notes []string `json:"notes,omitempty"`

	// known are the manifests the mark read.
	known map[key]bool
	// collection is what a registry store read during the mark.
	collection *registry.Collection
}

// Kept counts what a plan keeps.
type Kept struct {
	Manifests int            `json:"manifests"`
	Blobs     int            `json:"blobs"`
	Reasons   map[string]int `json:"reasons"`
}

// manifestTimer is a store that knows when it recorded each manifest of
// a repository (registry.Deleter has it).
type manifestTimer interface {
	ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error)
}

type key struct {
	repo string
	d    v1.Hash
}

// manifestStamps returns when the store recorded each manifest of repo
// and, where it keeps them, the versions Sweep's conditional removals
// need (registry.VersionedDeleter); an empty map when it keeps no times.
func manifestStamps(ctx context.Context, store registry.Store, repo string) (map[v1.Hash]registry.Stamp, error) {
	out := map[v1.Hash]registry.Stamp{}
	if vd, ok := store.(registry.VersionedDeleter); ok {
		ss, err := vd.ManifestStamps(ctx, repo)
		if err == nil {
			return ss, nil
		}
		if !errors.Is(err, errors.ErrUnsupported) {
			return nil, fmt.Errorf("reading when the manifests of %s were written: %w", repo, err)
		}
	}
	if mt, ok := store.(manifestTimer); ok {
		ts, err := mt.ManifestTimes(ctx, repo)
		if err != nil && !errors.Is(err, errors.ErrUnsupported) {
			return nil, fmt.Errorf("reading when the manifests of %s were written: %w", repo, err)
		}
		for d, t := range ts {
			out[d] = registry.Stamp{Time: t}
		}
	}
	return out, nil
}

func (k key) String() string { return k.repo + "@" + k.d.String() }

// node is one manifest of the store.
type node struct {
	key
	size      int64
	m         manifestDoc
	time      time.Time
	timeKnown bool
	version   string // the store's version of it ("" unknown)
	rule      *policy.RepositoryRetention
	kept      string // keep reason, "" while not kept
	eligible  string // eligible reason
	scanned   bool
}

// manifestDoc is the part of an OCI image manifest or index the mark
// reads.
type manifestDoc struct {
	MediaType    string            `json:"mediaType"`
	ArtifactType string            `json:"artifactType"`
	Config       *v1.Descriptor    `json:"config"`
	Layers       []v1.Descriptor   `json:"layers"`
	Manifests    []v1.Descriptor   `json:"manifests"`
	Subject      *v1.Descriptor    `json:"subject"`
	Annotations  map[string]string `json:"annotations"`
}

func (m *manifestDoc) blobs() []v1.Descriptor {
	var out []v1.Descriptor
	if m.Config != nil {
		out = append(out, *m.Config)
	}
	return append(out, m.Layers...)
}

type marker struct {
	store     registry.Store
	now       time.Time
	ret       *policy.Retention
	grace     time.Duration
	nodes     map[key]*node
	byDigest  map[v1.Hash][]*node
	referrers map[key][]*node
	blobKept  map[v1.Hash]string
	blobInfo  map[v1.Hash]Blob // size and one repository
	queue     []*node
	opts      Options
	// anyRepo is a repository of the store, to name a blob no manifest
	// references (blobs are shared when the store can list them).
	anyRepo string
	done    int64
}

// Mark reads the whole store and returns the plan pol's retention makes
// of it. The store must list its repositories and every manifest of each
// (registry.ManifestLister); a store that cannot is refused (BadInput):
// without the full list no artifact can be shown unreferenced. Mark
// changes nothing. An unreadable manifest or tag is an error: a plan made
// from a partial reading could remove something a missing piece names.
func Mark(ctx context.Context, store registry.Store, pol *policy.Policy, opts Options) (*Plan, error) {
	ml, ok := store.(registry.ManifestLister)
	if !ok {
		return nil, errkind.New(errkind.BadInput, "store %s cannot list its manifests: nothing can be shown unreferenced there", store)
	}
	// The tag listings and resolutions a registry store reads now are the
	// baseline its removals compare against (registry.Collection).
	coll := registry.NewCollection()
	ctx = registry.WithCollection(ctx, coll)
	now := opts.Now
	if now.IsZero() {
		now = testNow()
	}
	if now.IsZero() {
		now = time.Now()
	}
	mk := &marker{store: store, now: now.UTC(), nodes: map[key]*node{}, byDigest: map[v1.Hash][]*node{},
		referrers: map[key][]*node{}, blobKept: map[v1.Hash]string{}, blobInfo: map[v1.Hash]Blob{}, opts: opts}
	if pol != nil {
		mk.ret = pol.Retention
	}
	plan := &Plan{Store: store.String(), Now: mk.now, Retention: mk.ret != nil, Tags: []Tag{}, Manifests: []Manifest{}, Blobs: []Blob{},
		Groups: []Group{}, Kept: Kept{Reasons: map[string]int{}}}
	if mk.ret != nil {
		mk.grace = mk.ret.Grace
		plan.Grace = mk.grace.String()
	}
	repos, err := store.Repositories(ctx)
	if errors.Is(err, registry.ErrNoCatalog) {
		return nil, errkind.New(errkind.BadInput, "store %s does not list its repositories: the collector needs all of them, or it could remove what an unlisted repository names", store)
	}
	if err != nil {
		return nil, fmt.Errorf("listing repositories: %w", err)
	}
	type tagged struct {
		repo, tag string
		target    v1.Hash
	}
	var tags []tagged
	if len(repos) > 0 {
		mk.anyRepo = repos[0]
	}
	for _, repo := range repos {
		descs, err := ml.Manifests(ctx, repo)
		if err != nil {
			return nil, fmt.Errorf("listing the manifests of %s: %w", repo, err)
		}
		times, err := manifestStamps(ctx, store, repo)
		if err != nil {
			return nil, err
		}
		rule := mk.ret.For(repo)
		for _, d := range descs {
			if err := mk.read(ctx, repo, d.Digest, times, rule); err != nil {
				return nil, err
			}
		}
		names, err := store.Tags(ctx, repo)
		if err != nil {
			return nil, fmt.Errorf("listing the tags of %s: %w", repo, err)
		}
		for _, t := range names {
			d, err := store.Resolve(ctx, repo, t)
			if err != nil {
				return nil, fmt.Errorf("resolving %s:%s: %w", repo, t, err)
			}
			if mk.nodes[key{repo, d.Digest}] == nil {
				// A tag the manifest listing missed (a racing push):
				// read it too.
				if err := mk.read(ctx, repo, d.Digest, times, rule); err != nil {
					return nil, err
				}
			}
			tags = append(tags, tagged{repo, t, d.Digest})
		}
	}

	// Roots. Repositories without a rule, young manifests and those of
	// unknown age are kept whole.
	for _, n := range mk.sorted() {
		switch {
		case n.rule == nil:
			mk.keep(n, KeepNoRule)
		case isReleaseLog(n.m.ArtifactType):
			mk.keep(n, KeepReleaseLog)
		case !n.timeKnown:
			mk.keep(n, KeepAgeUnknown)
		case mk.now.Sub(n.time) < mk.grace:
			mk.keep(n, KeepYoung)
		}
	}
	guarded := map[string]bool{}
	for _, t := range tags {
		if strings.HasPrefix(t.tag, registry.ReleaseHeadPrefix) {
			guarded[t.repo+":"+strings.TrimPrefix(t.tag, registry.ReleaseHeadPrefix)] = true
		}
	}
	// Tags a policy names — the given one's, and the policy bound to each
	// guarded tag — never expire: a gate resolves its holdout, its encoder
	// tag and its target by them, and expiring one would stop every gate of
	// the rule (a holdout tag removed is no longer a holdout to gate on).
	named, err := policyTags(ctx, store, pol, guarded)
	if err != nil {
		return nil, err
	}
	for _, t := range tags {
		n := mk.nodes[key{t.repo, t.target}]
		if registry.IsReservedTag(t.tag) || guarded[t.repo+":"+t.tag] {
			mk.keep(n, KeepReleaseLog)
			continue
		}
		if named[t.repo+":"+t.tag] {
			mk.keep(n, KeepPolicy)
			continue
		}
		if e := n.rule.Expiry(t.tag); e != nil && n.timeKnown && mk.now.Sub(n.time) >= e.After {
			plan.Tags = append(plan.Tags, Tag{Repository: t.repo, Tag: t.tag, Target: t.target.String(), Reason: ReasonExpiredTag,
				Age: mk.now.Sub(n.time).Truncate(time.Second).String()})
			if n.eligible == "" {
				n.eligible = ReasonExpiredTag
			}
			continue
		}
		mk.keep(n, KeepTagged)
	}
	if pol != nil {
		for _, r := range pol.Rules {
			if h := r.HoldoutRef; h != nil && h.HasDigest() {
				if n := mk.nodes[key{h.Repository, h.Digest}]; n != nil {
					mk.keep(n, KeepPolicy)
				}
			}
		}
	}
	if err := mk.propagate(ctx); err != nil {
		return nil, err
	}
	// The newest candidates of each repository that nothing else keeps.
	byRepo := map[string][]*node{}
	for _, n := range mk.sorted() {
		k := artifact.KindOf(n.m.ArtifactType)
		if n.kept == "" && (k == model.KindEncoder || k == model.KindScorer) {
			byRepo[n.repo] = append(byRepo[n.repo], n)
		}
	}
	for _, ns := range byRepo {
		sort.SliceStable(ns, func(i, j int) bool { return ns[i].time.After(ns[j].time) })
		for i, n := range ns {
			if i < n.rule.KeepCandidates {
				mk.keep(n, KeepCandidates)
			}
		}
	}
	if err := mk.propagate(ctx); err != nil {
		return nil, err
	}
	mk.fill(plan)
	if n := plan.Kept.Reasons[KeepAgeUnknown]; n > 0 {
		plan.Notes = append(plan.Notes, fmt.Sprintf("%d manifests have no time the store recorded (on an OCI registry: pushed by a modelgate that wrote no push-time tags) and are kept; push or tag them again to give them one", n))
	}
	if opts.Blobs == nil && len(plan.Blobs) > 0 {
		plan.Notes = append(plan.Notes, "the store does not list its blobs: the blobs counted are those of eligible manifests only, and an OCI registry removes none (its own garbage collection reclaims their space once the manifests are gone)")
	}
	plan.collection = coll
	plan.known = map[key]bool{}
	for k := range mk.nodes {
		plan.known[k] = true
	}
	return plan, nil
}

// policyTags lists ("repo:tag") the tags that pol and the policies bound
// to the guarded tags name: rule targets, holdouts and encoder tags.
func policyTags(ctx context.Context, store registry.Store, pol *policy.Policy, guarded map[string]bool) (map[string]bool, error) {
	named := map[string]bool{}
	add := func(p *policy.Policy) {
		for _, n := range release.TagsNamed(p) {
			named[n.Ref.Repository+":"+n.Ref.Tag] = true
		}
	}
	add(pol)
	for g := range guarded {
		i := strings.LastIndex(g, ":")
		b, err := release.BoundPolicy(ctx, store, registry.Ref{Repository: g[:i], Tag: g[i+1:]})
		if err != nil {
			return nil, fmt.Errorf("reading the policy bound to %s: %w", g, err)
		}
		add(b.Policy)
	}
	return named, nil
}

var digestPattern = regexp.MustCompile(`sha256:[0-9a-f]{64}`)

// maxScan bounds the JSON layers the mark reads for digests.
const maxScan = 16 << 20

// read reads repo@d into the graph.
func (mk *marker) read(ctx context.Context, repo string, d v1.Hash, times map[v1.Hash]registry.Stamp, rule *policy.RepositoryRetention) error {
	k := key{repo, d}
	if mk.nodes[k] != nil {
		return nil
	}
	raw, desc, err := mk.store.Manifest(ctx, repo, d)
	if err != nil {
		return fmt.Errorf("reading manifest %s: %w", k, err)
	}
	n := &node{key: k, size: desc.Size, rule: rule}
	if err := json.Unmarshal(raw, &n.m); err != nil {
		return errkind.New(errkind.Integrity, "manifest %s is not valid JSON: %v", k, err)
	}
	// An item's age runs from when the store received it, never from its
	// created annotation (when it was made: a model trained months ago
	// and pushed today is new to the store). A store that cannot say
	// leaves it unknown, and the item is kept.
	if t, ok := times[d]; ok {
		n.time, n.timeKnown, n.version = t.Time.UTC(), true, t.Version
	}
	mk.nodes[k] = n
	mk.byDigest[d] = append(mk.byDigest[d], n)
	if n.m.Subject != nil {
		sk := key{repo, n.m.Subject.Digest}
		mk.referrers[sk] = append(mk.referrers[sk], n)
	}
	mk.done++
	if mk.opts.Progress != nil {
		mk.opts.Progress("mark", k.String(), mk.done)
	}
	return nil
}

func (mk *marker) sorted() []*node {
	out := make([]*node, 0, len(mk.nodes))
	for _, n := range mk.nodes {
		out = append(out, n)
	}
	sort.Slice(out, func(i, j int) bool {
		if out[i].repo != out[j].repo {
			return out[i].repo < out[j].repo
		}
		return out[i].d.String() < out[j].d.String()
	})
	return out
}

func (mk *marker) keep(n *node, why string) {
	if n == nil || n.kept != "" {
		return
	}
	n.kept = why
	mk.queue = append(mk.queue, n)
}

// propagate keeps everything the queued manifests reach.
func (mk *marker) propagate(ctx context.Context) error {
	for len(mk.queue) > 0 {
		n := mk.queue[len(mk.queue)-1]
		mk.queue = mk.queue[:len(mk.queue)-1]
		for _, b := range n.m.blobs() {
			if mk.blobKept[b.Digest] == "" {
				mk.blobKept[b.Digest] = KeepBlobOfKept
			}
		}
		for _, c := range n.m.Manifests {
			mk.keep(mk.nodes[key{n.repo, c.Digest}], KeepNamed)
		}
		if n.m.Subject != nil {
			mk.keep(mk.nodes[key{n.repo, n.m.Subject.Digest}], KeepSubject)
		}
		for _, r := range mk.referrers[n.key] {
			mk.keep(r, KeepReferrer)
		}
		if n.scanned {
			continue
		}
		n.scanned = true
		named, err := mk.named(ctx, n)
		if err != nil {
			return err
		}
		for _, d := range named {
			for _, o := range mk.byDigest[d] {
				mk.keep(o, KeepNamed)
			}
			if mk.blobKept[d] == "" {
				mk.blobKept[d] = KeepNamed
			}
		}
	}
	return nil
}

// named returns every digest n's annotations and small JSON blobs name.
func (mk *marker) named(ctx context.Context, n *node) ([]v1.Hash, error) {
	var text [][]byte
	for _, v := range n.m.Annotations {
		text = append(text, []byte(v))
	}
	for _, b := range n.m.blobs() {
		mt := string(b.MediaType)
		if !strings.HasSuffix(mt, "json") || b.Size > maxScan || b.Size == 0 {
			continue
		}
		raw, err := readAll(ctx, mk.store, n.repo, b)
		if err != nil {
			return nil, fmt.Errorf("reading %s of %s: %w", b.Digest, n.key, err)
		}
		if b.MediaType == release.MediaTypeEnvelope {
			if env, err := release.ParseEnvelope(raw); err == nil {
				raw = env.Payload
			}
		}
		text = append(text, raw)
	}
	var out []v1.Hash
	for _, t := range text {
		for _, m := range digestPattern.FindAll(t, -1) {
			if h, err := v1.NewHash(string(m)); err == nil && h != n.d {
				out = append(out, h)
			}
		}
	}
	return out, nil
}

func readAll(ctx context.Context, store registry.Store, repo string, d v1.Descriptor) ([]byte, error) {
	rc, err := store.Blob(ctx, repo, d.Digest)
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	var buf bytes.Buffer
	if _, err := io.Copy(&buf, io.LimitReader(rc, maxScan+1)); err != nil {
		return nil, err
	}
	return buf.Bytes(), nil
}

// fill lists the eligible items and totals them.
func (mk *marker) fill(plan *Plan) {
	groups := map[string]*Group{}
	group := func(r string) *Group {
		if groups[r] == nil {
			groups[r] = &Group{Reason: r}
		}
		return groups[r]
	}
	for _, t := range plan.Tags {
		group(t.Reason).Tags++
	}
	var elig []*node
	for _, n := range mk.sorted() {
		if n.kept != "" {
			plan.Kept.Manifests++
			plan.Kept.Reasons[n.kept]++
			continue
		}
		elig = append(elig, n)
	}
	// Reasons: a referrer of an eligible manifest says so; a model no tag
	// keeps is an old candidate; the target of an expired tag keeps its
	// reason; anything else is unreferenced.
	isElig := map[key]bool{}
	for _, n := range elig {
		isElig[n.key] = true
	}
	depth := map[key]int{}
	var depthOf func(n *node) int
	depthOf = func(n *node) int {
		if d, ok := depth[n.key]; ok {
			return d
		}
		depth[n.key] = 0 // cycles cannot occur with digests; guard anyway
		d := 0
		if n.m.Subject != nil && isElig[key{n.repo, n.m.Subject.Digest}] {
			d = 1 + depthOf(mk.nodes[key{n.repo, n.m.Subject.Digest}])
		}
		depth[n.key] = d
		return d
	}
	for _, n := range elig {
		k := artifact.KindOf(n.m.ArtifactType)
		switch {
		case n.eligible == ReasonExpiredTag:
		case n.m.Subject != nil && isElig[key{n.repo, n.m.Subject.Digest}]:
			n.eligible = ReasonReferrerOfEligible
		case k == model.KindEncoder || k == model.KindScorer:
			n.eligible = ReasonOldCandidate
		default:
			n.eligible = ReasonUnreferenced
		}
		depthOf(n)
	}
	sort.SliceStable(elig, func(i, j int) bool { return depth[elig[i].key] > depth[elig[j].key] })
	blobSeen := map[v1.Hash]bool{}
	for _, n := range elig {
		m := Manifest{Repository: n.repo, Digest: n.d.String(), Size: n.size, ArtifactType: n.m.ArtifactType, Reason: n.eligible}
		if n.m.Subject != nil {
			m.Subject = n.m.Subject.Digest.String()
		}
		if n.timeKnown {
			m.Time = n.time.Format(time.RFC3339)
		}
		m.version = n.version
		plan.Manifests = append(plan.Manifests, m)
		g := group(n.eligible)
		g.Manifests++
		g.Bytes += n.size
		for _, b := range n.m.blobs() {
			if mk.blobKept[b.Digest] != "" || blobSeen[b.Digest] || len(mk.byDigest[b.Digest]) > 0 {
				continue
			}
			blobSeen[b.Digest] = true
			mk.blobInfo[b.Digest] = Blob{Repository: n.repo, Digest: b.Digest.String(), Size: b.Size, Reason: n.eligible}
		}
	}
	// The store's own listing: unreferenced blobs, and the ages of the
	// blobs of eligible manifests (a blob uploaded within the grace
	// period may belong to a push in flight).
	if mk.opts.Blobs != nil {
		listed := map[v1.Hash]bool{}
		for _, sb := range mk.opts.Blobs {
			listed[sb.Digest] = true
			young := mk.now.Sub(sb.Modified) < mk.grace || sb.Modified.IsZero()
			b, ofEligible := mk.blobInfo[sb.Digest]
			switch {
			case mk.blobKept[sb.Digest] != "" || len(mk.byDigest[sb.Digest]) > 0:
			case young:
				delete(mk.blobInfo, sb.Digest)
				mk.blobKept[sb.Digest] = KeepBlobYoung
			case !ofEligible && mk.ret != nil:
				mk.blobInfo[sb.Digest] = Blob{Repository: mk.anyRepo, Digest: sb.Digest.String(), Size: sb.Size, Reason: ReasonUnreferencedBlob, version: sb.Version}
			case !ofEligible:
				mk.blobKept[sb.Digest] = KeepNoRule
			default:
				b.Size, b.version = sb.Size, sb.Version
				mk.blobInfo[sb.Digest] = b
			}
		}
		for d := range mk.blobInfo {
			if !listed[d] {
				// Not in the listing: gone already, or a store whose
				// listing leaves it out; nothing to remove.
				delete(mk.blobInfo, d)
			}
		}
	}
	for _, b := range mk.blobInfo {
		plan.Blobs = append(plan.Blobs, b)
	}
	sort.Slice(plan.Blobs, func(i, j int) bool { return plan.Blobs[i].Digest < plan.Blobs[j].Digest })
	for _, b := range plan.Blobs {
		g := group(b.Reason)
		g.Blobs++
		g.Bytes += b.Size
	}
	for d, why := range mk.blobKept {
		if len(mk.byDigest[d]) == 0 {
			plan.Kept.Blobs++
			plan.Kept.Reasons[why]++
		}
	}
	for _, g := range groups {
		plan.Groups = append(plan.Groups, *g)
		plan.Bytes += g.Bytes
	}
	sort.Slice(plan.Groups, func(i, j int) bool { return plan.Groups[i].Reason < plan.Groups[j].Reason })
}

// isReleaseLog reports whether an artifactType is a release record's or a
// marker of one: history, never collected.
func isReleaseLog(t string) bool {
	switch t {
	case release.ArtifactTypeRelease, release.ArtifactTypeCommitted, release.ArtifactTypeEnded:
		return true
	}
	return false
}
