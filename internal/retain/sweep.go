package retain

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// Remover is what Sweep needs of a store: the deletion primitives of
// registry.Deleter.
type Remover interface {
	DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error
	DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error
	DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error
}

// recheckEvery is how many blobs Sweep removes between two looks for
// manifests pushed since the mark (our own choice: a look lists every
// repository's manifests, so it costs about as much as removing a few
// hundred blobs).
const recheckEvery = 256

// Result is what Sweep did.
type Result struct {
	Tags      int   `json:"tags"`
	Manifests int   `json:"manifests"`
	Blobs     int   `json:"blobs"`
	Bytes     int64 `json:"bytes"`
	// Groups total what was removed, by reason.
	Groups []Group `json:"groups"`
	// Skipped lists what the plan named but Sweep left, and why (a tag
	// moved, a referrer or a push appeared since the mark).
	Skipped []Skip `json:"skipped"`
	// BlobsUnsupported is true when the store cannot remove blobs (an
	// OCI registry: its own garbage collection reclaims them).
	BlobsUnsupported bool `json:"blobsUnsupported"`
}

// Skip is an item Sweep left in place.
type Skip struct {
	Where string `json:"where"`
	Why   string `json:"why"`
}

// SweepOptions tune Sweep.
type SweepOptions struct {
	// Progress, when not nil, hears of each removal.
	Progress func(phase, name string, done, total int64)
}

// Sweep removes what plan lists, in its order: expired tags (each only if
// it still points where the plan saw it), then manifests, referrers
// before their subjects, then blobs. Each removal is a single idempotent
// store call, so a crash between any two leaves a store that verifies
// (at worst a referrer's subject gone before it, never the reverse, and
// blobs that nothing names, which verify reports as hints) and a new
// Mark and Sweep finish the job.
//
// What changed since the mark is respected: a manifest a tag now names,
// or that has a referrer the plan did not list, is left with its blobs;
// before the blobs go, and again every recheckEvery blobs, every manifest
// the store holds and the plan had not seen (a push since the mark) is
// read, and the blobs it references are left too. On a store that keeps
// versions (registry.VersionedDeleter: local, GCS) every manifest and blob
// is removed only while it is the version the mark saw, so one a push
// reused since the mark (registry.Refresher) stays, listed in Skipped.
func Sweep(ctx context.Context, store registry.Store, plan *Plan, opts SweepOptions) (*Result, error) {
	rm, ok := store.(Remover)
	if !ok {
		return nil, errkind.New(errkind.BadInput, "store %s cannot remove anything", store)
	}
	if plan.known == nil {
		return nil, errkind.New(errkind.Internal, "Sweep needs a plan made by Mark in this process")
	}
	ctx = registry.WithCollection(ctx, plan.collection)
	res := &Result{Groups: []Group{}, Skipped: []Skip{}}
	groups := map[string]*Group{}
	group := func(r string) *Group {
		if groups[r] == nil {
			groups[r] = &Group{Reason: r}
		}
		return groups[r]
	}
	total := int64(len(plan.Tags) + len(plan.Manifests) + len(plan.Blobs))
	var done int64
	step := func(phase, name string) {
		done++
		if opts.Progress != nil {
			opts.Progress(phase, name, done, total)
		}
	}
	// left are manifests the plan listed that stay: their blobs stay too.
	left := map[key]bool{}
	for _, t := range plan.Tags {
		where := t.Repository + ":" + t.Tag
		want, _ := v1.NewHash(t.Target)
		err := rm.DeleteTag(ctx, t.Repository, t.Tag, want)
		switch {
		case err == nil, errors.Is(err, registry.ErrNotFound):
			res.Tags++
			group(t.Reason).Tags++
		case errors.Is(err, registry.ErrConflict):
			res.Skipped = append(res.Skipped, Skip{where, "the tag moved since the mark"})
		default:
			return res, fmt.Errorf("removing tag %s: %w", where, err)
		}
		crashPoint("reclaim")
		step("reclaim-tag", where)
	}
	eligible := map[key]bool{}
	for _, m := range plan.Manifests {
		d, _ := v1.NewHash(m.Digest)
		eligible[key{m.Repository, d}] = true
	}
	for _, m := range plan.Manifests {
		d, _ := v1.NewHash(m.Digest)
		k := key{m.Repository, d}
		where := k.String()
		if why := newReferrer(ctx, store, k, eligible, left); why != "" {
			res.Skipped = append(res.Skipped, Skip{where, why})
			left[k] = true
			step("reclaim-manifest", where)
			continue
		}
		err := removeManifest(ctx, store, rm, m, d)
		switch {
		case errors.Is(err, registry.ErrInUse):
			res.Skipped = append(res.Skipped, Skip{where, "written or reused since the mark (a push)"})
			left[k] = true
		case err == nil:
			res.Manifests++
			res.Bytes += m.Size
			g := group(m.Reason)
			g.Manifests++
			g.Bytes += m.Size
		case errors.Is(err, registry.ErrConflict):
			res.Skipped = append(res.Skipped, Skip{where, "a tag names it, or it was pushed again, since the mark"})
			left[k] = true
		default:
			return res, fmt.Errorf("removing manifest %s: %w", where, err)
		}
		crashPoint("reclaim")
		step("reclaim-manifest", where)
	}
	if len(plan.Blobs) == 0 {
		return finish(res, groups), nil
	}
	// Blobs of manifests that stay, and of manifests pushed since the
	// mark, are not removed.
	hold, err := heldBlobs(ctx, store, plan, eligible)
	if err != nil {
		return res, err
	}
	removed := map[v1.Hash]bool{}
	for i, b := range plan.Blobs {
		if i > 0 && i%recheckEvery == 0 {
			// Look again for pushes since the last look: the window in
			// which a push can reuse a blob about to go stays short.
			if hold, err = heldBlobs(ctx, store, plan, eligible); err != nil {
				return res, err
			}
		}
		d, _ := v1.NewHash(b.Digest)
		if hold[d] {
			res.Skipped = append(res.Skipped, Skip{"blob " + b.Digest, "a manifest that stays references it"})
			step("reclaim-blob", b.Digest)
			continue
		}
		err := removeBlob(ctx, store, rm, b, d)
		switch {
		case errors.Is(err, registry.ErrInUse):
			res.Skipped = append(res.Skipped, Skip{"blob " + b.Digest, "written or reused since the mark (a push)"})
			step("reclaim-blob", b.Digest)
			continue
		case err == nil:
			res.Blobs++
			res.Bytes += b.Size
			g := group(b.Reason)
			g.Blobs++
			g.Bytes += b.Size
		case errors.Is(err, errors.ErrUnsupported):
			res.BlobsUnsupported = true
			return finish(res, groups), nil
		default:
			return res, fmt.Errorf("removing blob %s: %w", b.Digest, err)
		}
		removed[d] = true
		crashPoint("reclaim")
		step("reclaim-blob", b.Digest)
	}
	// A push that re-sent, while the blobs went, the very bytes of a
	// model being removed (its blobs found present, so not uploaded
	// again) can name a blob removed after the check above. Say so
	// rather than leave it to the next verify.
	if lost, err := lostBlobs(ctx, store, plan, eligible, removed); err != nil {
		return finish(res, groups), err
	} else if len(lost) > 0 {
		return finish(res, groups), errkind.New(errkind.Integrity, "pushed during the collection, %s: push it again", strings.Join(lost, "; "))
	}
	return finish(res, groups), nil
}

// removeManifest removes m, only while it is the version the mark saw
// when the store keeps versions (registry.VersionedDeleter): a push that
// reused it since then keeps it (registry.ErrInUse).
func removeManifest(ctx context.Context, store registry.Store, rm Remover, m Manifest, d v1.Hash) error {
	if vd, ok := store.(registry.VersionedDeleter); ok && m.version != "" {
		err := vd.DeleteManifestIf(ctx, m.Repository, d, m.version)
		if !errors.Is(err, errors.ErrUnsupported) {
			return err
		}
	}
	return rm.DeleteManifest(ctx, m.Repository, d)
}

// removeBlob is removeManifest for a blob.
func removeBlob(ctx context.Context, store registry.Store, rm Remover, b Blob, d v1.Hash) error {
	if vd, ok := store.(registry.VersionedDeleter); ok && b.version != "" {
		err := vd.DeleteBlobIf(ctx, b.Repository, d, b.version)
		if !errors.Is(err, errors.ErrUnsupported) {
			return err
		}
	}
	return rm.DeleteBlob(ctx, b.Repository, d)
}

// lostBlobs lists the manifests the plan did not keep that are in the
// store now and reference a blob Sweep removed.
func lostBlobs(ctx context.Context, store registry.Store, plan *Plan, eligible map[key]bool, removed map[v1.Hash]bool) ([]string, error) {
	if len(removed) == 0 {
		return nil, nil
	}
	var lost []string
	err := eachUnkept(ctx, store, plan, eligible, func(repo string, d v1.Hash, m *manifestDoc) {
		for _, b := range m.blobs() {
			if removed[b.Digest] {
				lost = append(lost, fmt.Sprintf("%s@%s names blob %s, which the collection removed", repo, d, b.Digest))
			}
		}
	})
	return lost, err
}

func finish(res *Result, groups map[string]*Group) *Result {
	for _, r := range []string{ReasonExpiredTag, ReasonOldCandidate, ReasonReferrerOfEligible, ReasonUnreferenced, ReasonUnreferencedBlob} {
		if g := groups[r]; g != nil {
			res.Groups = append(res.Groups, *g)
		}
	}
	return res
}

// newReferrer says why k must stay when a manifest the plan does not
// remove has k as its subject now ("" when none does).
func newReferrer(ctx context.Context, store registry.Store, k key, eligible, left map[key]bool) string {
	refs, err := store.Referrers(ctx, k.repo, k.d, "")
	if err != nil {
		if errors.Is(err, registry.ErrNotFound) {
			return ""
		}
		return fmt.Sprintf("its referrers could not be listed: %v", err)
	}
	for _, r := range refs {
		rk := key{k.repo, r.Digest}
		if !eligible[rk] || left[rk] {
			return fmt.Sprintf("%s refers to it and stays", r.Digest)
		}
	}
	return ""
}

// heldBlobs returns the blobs that manifests staying in the store
// reference, among those the plan did not know it kept: the manifests it
// listed but left, and every manifest pushed since the mark (a new one, or
// one Sweep removed and a push put back).
func heldBlobs(ctx context.Context, store registry.Store, plan *Plan, eligible map[key]bool) (map[v1.Hash]bool, error) {
	hold := map[v1.Hash]bool{}
	err := eachUnkept(ctx, store, plan, eligible, func(repo string, d v1.Hash, m *manifestDoc) {
		for _, b := range m.blobs() {
			hold[b.Digest] = true
		}
		hold[d] = true
	})
	return hold, err
}

// eachUnkept calls f with every manifest in the store now that the plan
// did not keep: new since the mark, or eligible and still (or again)
// there.
func eachUnkept(ctx context.Context, store registry.Store, plan *Plan, eligible map[key]bool, f func(repo string, d v1.Hash, m *manifestDoc)) error {
	ml := store.(registry.ManifestLister)
	repos, err := store.Repositories(ctx)
	if err != nil {
		return fmt.Errorf("listing repositories: %w", err)
	}
	for _, repo := range repos {
		descs, err := ml.Manifests(ctx, repo)
		if err != nil {
			return fmt.Errorf("listing the manifests of %s: %w", repo, err)
		}
		for _, desc := range descs {
			k := key{repo, desc.Digest}
			if plan.known[k] && !eligible[k] {
				continue
			}
			raw, _, err := store.Manifest(ctx, repo, desc.Digest)
			if errors.Is(err, registry.ErrNotFound) {
				continue
			}
			if err != nil {
				return fmt.Errorf("reading manifest %s: %w", k, err)
			}
			var m manifestDoc
			if err := json.Unmarshal(raw, &m); err != nil {
				return errkind.New(errkind.Integrity, "manifest %s is not valid JSON: %v", k, err)
			}
			f(repo, desc.Digest, &m)
		}
	}
	return nil
}
