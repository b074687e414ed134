package registry

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"regexp"
	"sort"
	"strconv"
	"sync"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Push times, and pushes racing a collection, on a registry.
//
// A registry records no time for a manifest, and a manifest's created
// annotation is when it was made (a model's training), not when it came
// into the store: a model trained months ago and pushed today is new to
// the store. So every write that makes a manifest reachable — PutManifest,
// Tag, and SwapTag to anything but a release record — first writes a
// push-time tag, sha256-<manifest>.p<Unix milliseconds of the writer's
// clock>.<8 random hex digits>, pointing at that manifest (one more tag per write; a re-push or
// a re-tag adds one). ManifestTimes reads them from the tag listing: a
// manifest's time is its newest push-time tag, and a manifest without any
// (put by a modelgate that wrote none) has no known time, which the
// collector takes as "keep". They go with their manifest.
//
// The distribution API has no conditional DELETE: the collector's last
// look at a manifest's tags and its DELETE are two requests, and
// docker-registry's DELETE by digest removes every tag naming the manifest,
// tags written in between included. What keeps a push's result, when a
// push of exactly those bytes races the collection of that manifest:
//
//	collector (deleteManifest)            push (PutManifest, then Tag)
//	C0 mark: tag listing L0, resolved     P1 push-time tag  (PUT)
//	C1 last look: tag listing L1, and     P2 keep tag       (PUT)
//	   HEADs of tags not resolved at C0   P3 user tag       (PUT, by Tag)
//	C2 DELETE by digest                   P4 read back: HEAD digest, keep
//	C3 HEAD digest; list the tags again      tag and user tag; put back what
//	   where the registry may keep them;     is missing, and read back again
//	   drop bookkeeping (each drop
//	   re-checks the digest)
//
//   - P1 before C0: the manifest is young at the mark (its push time is
//     within the grace period), so it is not eligible.
//   - C0 < P1 < C1: L1 has a push-time tag of the manifest that L0 did not:
//     the collector refuses (ErrConflict) and the sweep leaves it. Any
//     modelgate write that makes the manifest reachable starts with P1, so
//     this also covers a tag moved onto it through Tag or SwapTag, which C1
//     does not HEAD again (it reuses C0's resolutions: one reading of the
//     tags per collection).
//   - P1 after C1, P4 after C2: the push reads back after the DELETE, finds the
//     digest (or its keep tag, or its tag) gone and puts them back, then
//     reads back again (settleTries times at most: the collector deletes a
//     manifest once per sweep). If the put-back lands before C3, C3 sees
//     the digest and reports ErrConflict instead of removing bookkeeping.
//   - C1 < P1 < P4 < C2: the whole push between the collector's last look
//     and its DELETE. Nothing the push can read tells it. A registry that
//     keeps the tags of a deleted manifest (the in-memory one; any that
//     deletes tags by name) keeps the push's push-time tag: C3 lists the
//     tags again, finds one L1 did not have, and puts the manifest back
//     (its user tag is still there). docker-registry deletes the tags with
//     the manifest, so nothing is left to see: this one window — one tag
//     listing and one DELETE — is what its API cannot close; the README
//     says so. verify then reports the missing model, and pushing again
//     restores it.
//
// The same holds for the bookkeeping drops in C3 (a keep tag put back
// between a drop's check and its DELETE goes), and for a tag moved by
// another tool than modelgate (no push-time tag: C1 sees it only if its
// name is new since C0).

var pushTimeTagPattern = regexp.MustCompile(`^sha256-([a-f0-9]{64})\.p([0-9]{1,15})\.[a-f0-9]{8}$`)

// pushTimeTag names a new push-time tag of d at t. Eight random hex
// digits make each write's tag a new name whatever the clocks say, so
// that "a push-time tag the mark did not list" means exactly "written
// since the mark".
func pushTimeTag(d v1.Hash, t time.Time) string {
	var b [4]byte
	_, _ = rand.Read(b[:])
	return "sha256-" + d.Hex + ".p" + strconv.FormatInt(t.UnixMilli(), 10) + "." + hex.EncodeToString(b[:])
}

// parsePushTimeTag returns the manifest and time a push-time tag names.
func parsePushTimeTag(tag string) (v1.Hash, time.Time, bool) {
	m := pushTimeTagPattern.FindStringSubmatch(tag)
	if m == nil {
		return v1.Hash{}, time.Time{}, false
	}
	ms, err := strconv.ParseInt(m[2], 10, 64)
	if err != nil {
		return v1.Hash{}, time.Time{}, false
	}
	return v1.Hash{Algorithm: "sha256", Hex: m[1]}, time.UnixMilli(ms).UTC(), true
}

// settleTries is how many times a write puts back what a collection
// removed before it gives up (our own choice: a sweep deletes a manifest
// once, so a second put-back means several collections at once).
const settleTries = 3

// WithRemoteClock sets the clock push-time tags are written with (for
// tests; the default is time.Now).
func WithRemoteClock(now func() time.Time) RemoteOption {
	return func(r *Remote) { r.clock = now }
}

func (r *Remote) now() time.Time {
	if r.clock != nil {
		return r.clock()
	}
	return time.Now()
}

// isReleaseLogManifest reports whether raw is a release record or marker
// (never collected: no push time, no read-back needed).
func isReleaseLogManifest(raw []byte) bool {
	var mf manifestFields
	return json.Unmarshal(raw, &mf) == nil && IsReleaseLogType(mf.ArtifactType)
}

// stamp writes a push-time tag of dgst (the manifest's bytes again).
func (r *Remote) stamp(ctx context.Context, full string, mt types.MediaType, raw []byte, dgst v1.Hash) error {
	if _, err := r.putManifest(ctx, full, pushTimeTag(dgst, r.now()), mt, raw); err != nil {
		return fmt.Errorf("recording the push time of %s: %w", dgst, err)
	}
	return nil
}

// settle reads back, after a write, that manifest dgst is in full by
// digest, under its keep tag, and under tag (when not ""), and puts back
// whatever a collection running beside the write removed (see the comment
// at the top of this file); again reads back. A tag that points
// elsewhere was moved by someone else after us: theirs to keep. extra,
// when not nil, redoes the rest of the write (a referrer's bookkeeping).
func (r *Remote) settle(ctx context.Context, full string, mt types.MediaType, raw []byte, dgst v1.Hash, tag string, extra func() error) error {
	gone := func(ref string) (bool, error) {
		_, err := r.head(ctx, full, ref)
		switch {
		case err == nil:
			return false, nil
		case errors.Is(err, ErrNotFound):
			return true, nil
		}
		return false, fmt.Errorf("reading %s back: %w", ref, err)
	}
	for try := 0; ; try++ {
		// The reads go side by side, all after the writes.
		var (
			wg                            sync.WaitGroup
			digestGone, keepGone, tagGone bool
			errs                          [3]error
		)
		wg.Add(2)
		go func() { defer wg.Done(); digestGone, errs[0] = gone(dgst.String()) }()
		go func() { defer wg.Done(); keepGone, errs[1] = gone(keepTag(dgst)) }()
		if tag != "" {
			wg.Add(1)
			go func() { defer wg.Done(); tagGone, errs[2] = gone(tag) }()
		}
		wg.Wait()
		if err := errors.Join(errs[:]...); err != nil {
			return err
		}
		if !digestGone && !keepGone && !tagGone {
			return nil
		}
		if try == settleTries {
			return errkind.New(errkind.Conflict, "%s was removed again each time it was put back (%d times): a collection is removing it; push again once it has finished: %w", dgst, settleTries, ErrConflict)
		}
		var refs []string
		if digestGone {
			// Put back as pushed now; the keep tag puts the digest back
			// also on a registry that kept the tag of the deleted manifest.
			refs = append(refs, pushTimeTag(dgst, r.now()), keepTag(dgst))
		} else if keepGone {
			refs = append(refs, keepTag(dgst))
		}
		if tagGone {
			refs = append(refs, tag)
		}
		for _, ref := range refs {
			if _, err := r.putManifest(ctx, full, ref, mt, raw); err != nil {
				return fmt.Errorf("putting back %s: %w", ref, err)
			}
		}
		if extra != nil {
			if err := extra(); err != nil {
				return err
			}
		}
	}
}

// ManifestTimes returns, for each manifest of repo with a push-time tag,
// the newest one's time. Manifests without one are left out (their time
// is unknown). Under a Collection the listing is remembered, as the
// baseline the removals compare against.
func (r *Remote) ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	full := fullName(r.prefix, repo)
	all, err := r.allTags(ctx, full)
	if errors.Is(err, ErrNotFound) {
		all, err = []string{}, nil
	}
	if err != nil {
		return nil, err
	}
	if c := collectionOf(ctx); c != nil {
		c.setListed(full, all)
	}
	out := map[v1.Hash]time.Time{}
	for _, t := range all {
		if d, at, ok := parsePushTimeTag(t); ok && at.After(out[d]) {
			out[d] = at
		}
	}
	return out, nil
}

// Collection is what one collection (a mark, then a sweep) read of a
// registry store's tags: each repository's tag listing when the mark read
// the push times, and the tags the mark resolved. DeleteManifest under it
// lists the repository's tags once more and resolves only the tags the
// mark did not (instead of every tag), and refuses a manifest that has a
// push-time tag the mark's listing did not have. Other stores ignore it.
// Safe for concurrent use.
type Collection struct {
	mu       sync.Mutex
	listed   map[string]map[string]bool
	resolved map[string]map[string]v1.Hash
}

// NewCollection starts an empty Collection.
func NewCollection() *Collection {
	return &Collection{listed: map[string]map[string]bool{}, resolved: map[string]map[string]v1.Hash{}}
}

type collectionKey struct{}

// WithCollection returns a context under which a registry store records
// into c (the mark) and reads from it (the sweep).
func WithCollection(ctx context.Context, c *Collection) context.Context {
	if c == nil {
		return ctx
	}
	return context.WithValue(ctx, collectionKey{}, c)
}

func collectionOf(ctx context.Context) *Collection {
	c, _ := ctx.Value(collectionKey{}).(*Collection)
	return c
}

func (c *Collection) setListed(full string, tags []string) {
	set := make(map[string]bool, len(tags))
	for _, t := range tags {
		set[t] = true
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.listed[full] == nil {
		c.listed[full] = set
	}
}

func (c *Collection) baseline(full string) map[string]bool {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.listed[full]
}

func (c *Collection) setResolved(full, tag string, d v1.Hash) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.listed[full] == nil {
		// Resolutions count only against a listing made before them.
		return
	}
	if c.resolved[full] == nil {
		c.resolved[full] = map[string]v1.Hash{}
	}
	if _, ok := c.resolved[full][tag]; !ok {
		c.resolved[full][tag] = d
	}
}

func (c *Collection) resolvedAt(full, tag string) (v1.Hash, bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	d, ok := c.resolved[full][tag]
	return d, ok
}

// checkTagAt checks, with two reads at once, that repo:tag has no release
// log and points at want (DeleteTag's checks, read right before its
// DELETE).
func (r *Remote) checkTagAt(ctx context.Context, repo, full, tag string, want v1.Hash) error {
	var (
		wg              sync.WaitGroup
		cur             v1.Descriptor
		curErr, headErr error
		guardable       = ValidateTag(HeadTag(tag)) == nil
	)
	wg.Add(1)
	go func() { defer wg.Done(); cur, curErr = r.head(ctx, full, tag) }()
	if guardable {
		wg.Add(1)
		go func() { defer wg.Done(); _, headErr = r.head(ctx, full, HeadTag(tag)) }()
	}
	wg.Wait()
	if guardable {
		switch {
		case headErr == nil:
			return releasedTagError(repo, tag)
		case !errors.Is(headErr, ErrNotFound):
			return fmt.Errorf("checking whether %s:%s has a release log: %w", repo, tag, headErr)
		}
	}
	switch {
	case errors.Is(curErr, ErrNotFound):
		return notFound("tag %s:%s", repo, tag)
	case curErr != nil:
		return curErr
	case cur.Digest != want:
		return errkind.New(errkind.Conflict, "tag %s:%s points at %s, not %s: %w", repo, tag, cur.Digest, want, ErrConflict)
	}
	return nil
}

// taggedErr is lastLook's refusal of a manifest tags name, with the tags.
type taggedErr struct {
	tags []string
	err  error
}

func (e *taggedErr) Error() string { return e.err.Error() }
func (e *taggedErr) Unwrap() error { return e.err }

// stampsOf lists the push-time tags of dgst among tags.
func stampsOf(tags []string, dgst v1.Hash) []string {
	var out []string
	for _, t := range tags {
		if d, _, ok := parsePushTimeTag(t); ok && d == dgst {
			out = append(out, t)
		}
	}
	return out
}

// lastLook is the collector's last reading before it deletes dgst from
// full (C1 in the comment at the top of this file): the repository's
// tags, listed once. It returns the manifest's push-time tags, and refuses
// (ErrConflict) when a tag other than except names dgst or, under a
// Collection, when dgst has a push-time tag the mark's listing did not.
// Under a Collection the tags the mark resolved are not resolved again;
// the others are (tagResolvers at a time). When except is not "",
// checkTagAt runs on it at the same time as the listing.
func (r *Remote) lastLook(ctx context.Context, repo, full string, dgst v1.Hash, except string) ([]string, error) {
	var (
		wg       sync.WaitGroup
		all      []string
		listErr  error
		checkErr error
	)
	if except != "" {
		wg.Add(1)
		go func() { defer wg.Done(); checkErr = r.checkTagAt(ctx, repo, full, except, dgst) }()
	}
	all, listErr = r.allTags(ctx, full)
	wg.Wait()
	if checkErr != nil {
		return nil, checkErr
	}
	if errors.Is(listErr, ErrNotFound) {
		return nil, nil
	}
	if listErr != nil {
		return nil, listErr
	}
	c := collectionOf(ctx)
	var base map[string]bool
	if c != nil {
		base = c.baseline(full)
	}
	stamps := stampsOf(all, dgst)
	for _, t := range stamps {
		if base != nil && !base[t] {
			return nil, errkind.New(errkind.Conflict, "%s@%s was pushed or tagged again since the collection's mark (%s): %w", repo, dgst, t, ErrConflict)
		}
	}
	var resolve, named []string
	for _, t := range all {
		if t == except || isReservedTag(t) || ValidateTag(t) != nil {
			continue
		}
		if base != nil && base[t] {
			if d, ok := c.resolvedAt(full, t); ok {
				if d == dgst {
					named = append(named, t)
				}
				continue
			}
		}
		resolve = append(resolve, t)
	}
	found, err := tagsPointingAt(ctx, resolve, dgst, func(ctx context.Context, t string) (v1.Hash, error) {
		d, err := r.head(ctx, full, t)
		return d.Digest, err
	})
	if err != nil {
		return nil, err
	}
	if named = append(named, found...); len(named) > 0 {
		sort.Strings(named)
		return nil, &taggedErr{named, taggedError(repo, dgst, named)}
	}
	return stamps, nil
}

// putBackIfPushed lists full's tags after dgst was deleted and, when dgst
// has a push-time tag that the last look (seen) did not, puts the
// manifest back under its keep tag and refuses (ErrConflict): a push ran
// between the last look and the DELETE, and its tags are still there.
func (r *Remote) putBackIfPushed(ctx context.Context, repo, full string, dgst v1.Hash, raw []byte, seen []string) error {
	all, err := r.allTags(ctx, full)
	if errors.Is(err, ErrNotFound) {
		return nil
	}
	if err != nil {
		return err
	}
	old := map[string]bool{}
	for _, t := range seen {
		old[t] = true
	}
	for _, t := range stampsOf(all, dgst) {
		if old[t] {
			continue
		}
		var mf manifestFields
		_ = json.Unmarshal(raw, &mf)
		mt := mf.MediaType
		if mt == "" {
			mt = types.OCIManifestSchema1
		}
		if _, err := r.putManifest(ctx, full, keepTag(dgst), mt, raw); err != nil {
			return fmt.Errorf("putting back %s@%s, pushed while it was being removed: %w", repo, dgst, err)
		}
		return errkind.New(errkind.Conflict, "%s@%s was pushed while it was being removed (%s): put back: %w", repo, dgst, t, ErrConflict)
	}
	return nil
}

// presentByDigest reports whether full has manifest dgst now.
func (r *Remote) presentByDigest(ctx context.Context, full string, dgst v1.Hash) (bool, error) {
	_, err := r.head(ctx, full, dgst.String())
	switch {
	case err == nil:
		return true, nil
	case errors.Is(err, ErrNotFound):
		return false, nil
	}
	return false, err
}
