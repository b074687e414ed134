package registry

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"maps"
	"slices"
	"sort"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// CopyEvent is a progress event of Copy: Phase "blob" (Done/Total bytes of
// one blob), "skip" (a blob or manifest already at the destination),
// "manifest", "tag".
type CopyEvent struct {
	Phase string `json:"phase"`
	Name  string `json:"name"`
	Done  int64  `json:"done"`
	Total int64  `json:"total"`
}

// CopyOptions tune Copy and CopyAll.
type CopyOptions struct {
	// Progress receives events; nil means none.
	Progress func(CopyEvent)
	// Needs, when set, names what the manifest raw (in repo of src) needs
	// besides its blobs and referrers: other manifests, perhaps in other
	// repositories, that are copied with it, recursively (a scorer's
	// encoder; a release record's model). previous is the release record
	// before it in its tag's log ("" for none, or when raw is not a
	// record); it is copied too, and it is how copy follows a release log
	// from its head.
	Needs func(ctx context.Context, src Store, repo string, raw []byte) (needs []Ref, previous string, err error)
	// CheckTag, when set, is asked before anything is written whether a
	// plain tag (one without a release log at the source) may be written
	// at the destination, naming target; an error refuses the copy.
	CheckTag func(ctx context.Context, repo, tag string, target v1.Hash) error
}

// CopiedManifest is one manifest Copy handled.
type CopiedManifest struct {
	Repository   string `json:"repository"`
	Digest       string `json:"digest"`
	ArtifactType string `json:"artifactType,omitempty"`
	// Subject is the manifest this one refers to, when it is a referrer.
	Subject string `json:"subject,omitempty"`
	// Present is true when the destination already had it.
	Present bool `json:"present"`
}

// CopyResult says what Copy did.
type CopyResult struct {
	Source       string           `json:"source"`
	Destination  string           `json:"destination"`
	Manifests    []CopiedManifest `json:"manifests"`
	Tags         []string         `json:"tags"`
	BlobsCopied  int              `json:"blobsCopied"`
	BlobsSkipped int              `json:"blobsSkipped"`
	BytesCopied  int64            `json:"bytesCopied"`
}

type copier struct {
	src, dst Store
	o        CopyOptions
	res      *CopyResult
	done     map[string]bool // repo@digest of manifests handled
}

func (c *copier) emit(e CopyEvent) {
	if c.o.Progress != nil {
		c.o.Progress(e)
	}
}

// Copy copies the artifact ref names (NAME:TAG or NAME@DIGEST) from src to
// dst: its blobs (skipping those dst has at the right size), its manifest
// (same bytes, so the same digest), every manifest that refers to it, and
// theirs, and what o.Needs names, recursively; then, when ref has a tag,
// the tag — names last, so an interrupted copy leaves no tag pointing at
// missing content and can simply be run again.
//
// A tag with a release log at the source (its head pointer HeadTag
// exists) is copied with its log: the head record and, through o.Needs,
// every earlier record and the models they released; then the tag and
// its head pointer move by compare-and-swap (see copier.moveReleased). A
// tag the destination would refuse (reserved, or with a release log the
// source's does not continue) is refused before anything is written.
func Copy(ctx context.Context, src, dst Store, ref Ref, o CopyOptions) (*CopyResult, error) {
	c := newCopier(src, dst, o)
	var desc v1.Descriptor
	var err error
	if ref.HasDigest() {
		_, desc, err = src.Manifest(ctx, ref.Repository, ref.Digest)
	} else {
		if err := CheckTagName(ref.Tag); err != nil {
			return nil, fmt.Errorf("copying %s: %w (copy NAME:TAG copies a tag's release log with it)", ref, err)
		}
		desc, err = src.Resolve(ctx, ref.Repository, ref.Tag)
	}
	if err != nil {
		return nil, fmt.Errorf("copying %s: %w", ref, err)
	}
	var plan *tagPlan
	if ref.Tag != "" {
		if plan, err = c.planTag(ctx, ref.Repository, ref.Tag, desc.Digest); err != nil {
			return nil, fmt.Errorf("copying %s: %w", ref, err)
		}
	}
	if err := c.manifest(ctx, ref.Repository, desc.Digest, ""); err != nil {
		return nil, fmt.Errorf("copying %s: %w", ref, err)
	}
	if plan != nil {
		if err := c.tag(ctx, plan); err != nil {
			return nil, fmt.Errorf("copying %s: %w", ref, err)
		}
	}
	return c.res, nil
}

func newCopier(src, dst Store, o CopyOptions) *copier {
	return &copier{src: src, dst: dst, o: o, done: map[string]bool{},
		res: &CopyResult{Source: src.String(), Destination: dst.String(), Manifests: []CopiedManifest{}, Tags: []string{}}}
}

// tagPlan is a tag copy decided before anything is written.
type tagPlan struct {
	repo, tag string
	target    v1.Hash
	// head is the source's release head record; zero for a plain tag.
	head v1.Hash
	// dstTag and dstHead are what the destination has now (zero: absent).
	dstTag, dstHead v1.Hash
}

// planTag decides how repo:tag (at target in src) is copied, refusing
// what the destination would refuse, before anything is written. A plain
// tag is written by Tag, whose guard refuses a tag with a release log at
// the destination. A released tag may land where the destination has no
// release log for it, or where the destination's head record is one of
// the source's log (the mirror is behind, or an earlier copy was
// interrupted): copy then brings the log forward. A destination whose log
// the source's does not contain has releases of its own: refused
// (errkind.Unauthorized), they move only by promote and rollback there.
func (c *copier) planTag(ctx context.Context, repo, tag string, target v1.Hash) (*tagPlan, error) {
	p := &tagPlan{repo: repo, tag: tag, target: target}
	resolve := func(s Store, t string) (v1.Hash, error) {
		d, err := s.Resolve(ctx, repo, t)
		if errors.Is(err, ErrNotFound) {
			return v1.Hash{}, nil
		}
		return d.Digest, err
	}
	var err error
	if ValidateTag(HeadTag(tag)) == nil {
		if p.head, err = resolve(c.src, HeadTag(tag)); err != nil {
			return nil, err
		}
	}
	if p.head == (v1.Hash{}) {
		if err := CheckTagWrite(ctx, c.dst, repo, tag); err != nil {
			return nil, err
		}
		if c.o.CheckTag != nil {
			if err := c.o.CheckTag(ctx, repo, tag, target); err != nil {
				return nil, err
			}
		}
		return p, nil
	}
	if _, ok := c.dst.(TagSwapper); !ok {
		return nil, errkind.New(errkind.BadInput, "%s:%s has a release log, and %s cannot compare-and-swap tags to copy it", repo, tag, c.dst)
	}
	if p.dstTag, err = resolve(c.dst, tag); err != nil {
		return nil, err
	}
	if p.dstHead, err = resolve(c.dst, HeadTag(tag)); err != nil {
		return nil, err
	}
	switch {
	case p.dstHead == (v1.Hash{}):
		return p, nil
	case p.dstHead == p.head:
		if p.dstTag != target {
			return nil, errkind.New(errkind.Integrity, "at %s, %s:%s points at %s, not where its release log (the same as the source's) says: run `modelgate log %s:%s` there", c.dst, repo, tag, orAbsentHash(p.dstTag), repo, tag)
		}
		return p, nil
	}
	chain, err := c.chain(ctx, repo, p.head)
	if err != nil {
		return nil, err
	}
	if !chain[p.dstHead] {
		return nil, errkind.New(errkind.Unauthorized, "at %s, %s:%s has releases the source's log does not contain (its newest record is %s): copy does not overwrite a release log; move the tag there with `modelgate promote` or `modelgate rollback`: %w", c.dst, repo, tag, p.dstHead, ErrGuarded)
	}
	// The destination's tag must be where its own newest record left it
	// (that record's subject), or already at the target (an interrupted
	// copy moved the tag and not yet the head).
	raw, _, err := c.dst.Manifest(ctx, repo, p.dstHead)
	if err != nil {
		return nil, err
	}
	var mf manifestFields
	if err := json.Unmarshal(raw, &mf); err != nil || mf.Subject == nil {
		return nil, errkind.New(errkind.Integrity, "at %s, the release head record %s of %s:%s is not a record", c.dst, p.dstHead, repo, tag)
	}
	if p.dstTag != mf.Subject.Digest && p.dstTag != target {
		return nil, errkind.New(errkind.Integrity, "at %s, %s:%s points at %s, but its newest release record says %s: run `modelgate log %s:%s` there", c.dst, repo, tag, orAbsentHash(p.dstTag), mf.Subject.Digest, repo, tag)
	}
	return p, nil
}

func orAbsentHash(h v1.Hash) string {
	if h == (v1.Hash{}) {
		return "(absent)"
	}
	return h.String()
}

// chain returns the release records of the log whose head is head in
// src's repo, following Needs' previous links (reads only).
func (c *copier) chain(ctx context.Context, repo string, head v1.Hash) (map[v1.Hash]bool, error) {
	out := map[v1.Hash]bool{}
	if c.o.Needs == nil {
		return out, nil
	}
	for d := head; d != (v1.Hash{}) && !out[d]; {
		out[d] = true
		raw, _, err := c.src.Manifest(ctx, repo, d)
		if err != nil {
			return nil, fmt.Errorf("reading release record %s: %w", d, err)
		}
		_, prev, err := c.o.Needs(ctx, c.src, repo, raw)
		if err != nil || prev == "" {
			return out, err
		}
		if d, err = ParseDigest(prev); err != nil {
			return nil, err
		}
	}
	return out, nil
}

// CopyAll copies every repository of src: every manifest it can list
// (tagged ones, their referrers, and all of them when src is a
// ManifestLister), then every tag.
//
// Tags are planned first, as in Copy: when one would be refused, nothing
// is written. Head pointers are not copied as tags of their own: each
// moves with its tag.
func CopyAll(ctx context.Context, src, dst Store, o CopyOptions) (*CopyResult, error) {
	c := newCopier(src, dst, o)
	repos, err := src.Repositories(ctx)
	if err != nil {
		return nil, err
	}
	type repoTags struct {
		repo    string
		targets map[string]v1.Hash
		plans   []*tagPlan
	}
	var all []repoTags
	for _, repo := range repos {
		tags, err := src.Tags(ctx, repo)
		if err != nil && !errors.Is(err, ErrNotFound) {
			return nil, err
		}
		rt := repoTags{repo: repo, targets: map[string]v1.Hash{}}
		for _, t := range tags {
			d, err := src.Resolve(ctx, repo, t)
			if err != nil {
				return nil, fmt.Errorf("copying %s:%s: %w", repo, t, err)
			}
			rt.targets[t] = d.Digest
			if strings.HasPrefix(t, ReleaseHeadPrefix) {
				continue
			}
			p, err := c.planTag(ctx, repo, t, d.Digest)
			if err != nil {
				return nil, fmt.Errorf("copying %s:%s: %w", repo, t, err)
			}
			rt.plans = append(rt.plans, p)
		}
		all = append(all, rt)
	}
	for _, rt := range all {
		repo := rt.repo
		for _, t := range slices.Sorted(maps.Keys(rt.targets)) {
			if err := c.manifest(ctx, repo, rt.targets[t], ""); err != nil {
				return nil, fmt.Errorf("copying %s:%s: %w", repo, t, err)
			}
		}
		if ml, ok := src.(ManifestLister); ok {
			ds, err := ml.Manifests(ctx, repo)
			if err != nil {
				return nil, err
			}
			for _, d := range ds {
				if err := c.manifest(ctx, repo, d.Digest, ""); err != nil {
					return nil, fmt.Errorf("copying %s@%s: %w", repo, d.Digest, err)
				}
			}
		}
		for _, p := range rt.plans {
			if err := c.tag(ctx, p); err != nil {
				return nil, fmt.Errorf("copying %s:%s: %w", repo, p.tag, err)
			}
		}
	}
	return c.res, nil
}

// tag writes a planned tag: a plain one by Tag; a released one, after its
// head record and log are copied, by compare-and-swap from what planTag
// saw — the tag first, then its head pointer, the order promote uses, so
// an interrupted copy leaves a state the next copy (or promote) completes.
func (c *copier) tag(ctx context.Context, p *tagPlan) error {
	_, d, err := c.dst.Manifest(ctx, p.repo, p.target)
	if err != nil {
		return err
	}
	if p.head == (v1.Hash{}) {
		if err := c.dst.Tag(ctx, p.repo, p.tag, d); err != nil {
			return err
		}
		c.tagged(p.repo, p.tag)
		return nil
	}
	if err := c.manifest(ctx, p.repo, p.head, ""); err != nil {
		return err
	}
	_, hd, err := c.dst.Manifest(ctx, p.repo, p.head)
	if err != nil {
		return err
	}
	sw := c.dst.(TagSwapper)
	if p.dstTag != p.target {
		if err := sw.SwapTag(ctx, p.repo, p.tag, p.dstTag, d); err != nil {
			return err
		}
	}
	c.tagged(p.repo, p.tag)
	if p.dstHead != p.head {
		if err := sw.SwapTag(ctx, p.repo, HeadTag(p.tag), p.dstHead, hd); err != nil {
			return err
		}
	}
	c.tagged(p.repo, HeadTag(p.tag))
	return nil
}

func (c *copier) tagged(repo, tag string) {
	c.res.Tags = append(c.res.Tags, repo+":"+tag)
	c.emit(CopyEvent{Phase: "tag", Name: repo + ":" + tag})
}

// manifest copies one manifest with what it references, then its
// referrers.
func (c *copier) manifest(ctx context.Context, repo string, dgst v1.Hash, subject string) error {
	key := repo + "@" + dgst.String()
	if c.done[key] {
		return nil
	}
	c.done[key] = true
	raw, desc, err := c.src.Manifest(ctx, repo, dgst)
	if err != nil {
		return err
	}
	var mf manifestFields
	if err := json.Unmarshal(raw, &mf); err != nil {
		return errkind.New(errkind.Integrity, "manifest %s is not valid JSON: %v", dgst, err)
	}
	cm := CopiedManifest{Repository: repo, Digest: dgst.String(), ArtifactType: desc.ArtifactType, Subject: subject}
	if _, _, err := c.dst.Manifest(ctx, repo, dgst); err == nil {
		cm.Present = true
		c.emit(CopyEvent{Phase: "skip", Name: key})
	} else if !errors.Is(err, ErrNotFound) {
		return err
	}
	if !cm.Present {
		if isIndexManifest(desc.MediaType) {
			for _, m := range mf.Manifests {
				if err := c.manifest(ctx, repo, m.Digest, ""); err != nil {
					return err
				}
			}
		} else if mf.Config != nil {
			for _, b := range append([]v1.Descriptor{*mf.Config}, mf.Layers...) {
				if err := c.blob(ctx, repo, b); err != nil {
					return err
				}
			}
		}
		got, err := c.dst.PutManifest(ctx, repo, desc.MediaType, raw)
		if err != nil {
			return err
		}
		if got.Digest != dgst {
			return errkind.New(errkind.Integrity, "the destination stored manifest %s as %s", dgst, got.Digest)
		}
		c.emit(CopyEvent{Phase: "manifest", Name: key, Done: desc.Size, Total: desc.Size})
	}
	c.res.Manifests = append(c.res.Manifests, cm)
	refs, err := c.src.Referrers(ctx, repo, dgst, "")
	if err != nil {
		return fmt.Errorf("listing referrers of %s: %w", dgst, err)
	}
	sort.Slice(refs, func(i, j int) bool { return refs[i].Digest.String() < refs[j].Digest.String() })
	for _, r := range refs {
		if err := c.manifest(ctx, repo, r.Digest, dgst.String()); err != nil {
			return err
		}
	}
	if c.o.Needs == nil {
		return nil
	}
	needs, prev, err := c.o.Needs(ctx, c.src, repo, raw)
	if err != nil {
		return fmt.Errorf("what %s@%s needs: %w", repo, dgst, err)
	}
	if prev != "" {
		d, err := ParseDigest(prev)
		if err != nil {
			return err
		}
		needs = append(needs, Ref{Repository: repo, Digest: d})
	}
	for _, n := range needs {
		if err := c.manifest(ctx, n.Repository, n.Digest, ""); err != nil {
			return fmt.Errorf("%s@%s needs %s: %w", repo, dgst, n, err)
		}
	}
	return nil
}

// blob copies one blob unless dst has it at the right size, streaming it
// (both stores verify it).
func (c *copier) blob(ctx context.Context, repo string, d v1.Descriptor) error {
	if size, err := c.dst.StatBlob(ctx, repo, d.Digest); err == nil && size == d.Size {
		c.res.BlobsSkipped++
		c.emit(CopyEvent{Phase: "skip", Name: d.Digest.String(), Done: d.Size, Total: d.Size})
		return nil
	}
	rc, err := c.src.Blob(ctx, repo, d.Digest)
	if err != nil {
		return err
	}
	defer rc.Close()
	pr := &progressReader{r: rc, name: d.Digest.String(), total: d.Size, emit: c.emit}
	if err := c.dst.PutBlob(ctx, repo, d.Digest, d.Size, pr); err != nil {
		if pr.err != nil {
			return fmt.Errorf("reading blob %s from the source: %w", d.Digest, pr.err)
		}
		return err
	}
	c.res.BlobsCopied++
	c.res.BytesCopied += d.Size
	return nil
}

// progressReader reports bytes read, at most every 4 MiB, and keeps the
// source's read error (a corrupt source blob is the source's fault).
type progressReader struct {
	r        io.Reader
	name     string
	n, total int64
	last     int64
	emit     func(CopyEvent)
	err      error
}

func (p *progressReader) Read(b []byte) (int, error) {
	n, err := p.r.Read(b)
	p.n += int64(n)
	if p.n-p.last >= 4<<20 || (err == io.EOF && p.n != p.last) || p.n == 0 {
		p.last = p.n
		p.emit(CopyEvent{Phase: "blob", Name: p.name, Done: p.n, Total: p.total})
	}
	if err != nil && err != io.EOF {
		p.err = err
	}
	return n, err
}
