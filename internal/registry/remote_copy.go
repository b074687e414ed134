package registry

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"sort"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"modelgate/internal/errkind"
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
// theirs, recursively; then, when ref has a tag, the tag — names last, so
// an interrupted copy leaves no tag pointing at missing content and can
// simply be run again.
func Copy(ctx context.Context, src, dst Store, ref Ref, o CopyOptions) (*CopyResult, error) {
	c := &copier{src: src, dst: dst, o: o, done: map[string]bool{},
		res: &CopyResult{Source: src.String(), Destination: dst.String(), Manifests: []CopiedManifest{}, Tags: []string{}}}
	var desc v1.Descriptor
	var err error
	if ref.HasDigest() {
		_, desc, err = src.Manifest(ctx, ref.Repository, ref.Digest)
	} else {
		desc, err = src.Resolve(ctx, ref.Repository, ref.Tag)
	}
	if err != nil {
		return nil, fmt.Errorf("copying %s: %w", ref, err)
	}
	if err := c.manifest(ctx, ref.Repository, desc.Digest, ""); err != nil {
		return nil, fmt.Errorf("copying %s: %w", ref, err)
	}
	if ref.Tag != "" {
		if err := c.tag(ctx, ref.Repository, ref.Tag, desc.Digest); err != nil {
			return nil, fmt.Errorf("copying %s: %w", ref, err)
		}
	}
	return c.res, nil
}

// CopyAll copies every repository of src: every manifest it can list
// (tagged ones, their referrers, and all of them when src is a
// ManifestLister), then every tag.
func CopyAll(ctx context.Context, src, dst Store, o CopyOptions) (*CopyResult, error) {
	c := &copier{src: src, dst: dst, o: o, done: map[string]bool{},
		res: &CopyResult{Source: src.String(), Destination: dst.String(), Manifests: []CopiedManifest{}, Tags: []string{}}}
	repos, err := src.Repositories(ctx)
	if err != nil {
		return nil, err
	}
	for _, repo := range repos {
		tags, err := src.Tags(ctx, repo)
		if err != nil && !errors.Is(err, ErrNotFound) {
			return nil, err
		}
		targets := map[string]v1.Hash{}
		for _, t := range tags {
			d, err := src.Resolve(ctx, repo, t)
			if err != nil {
				return nil, fmt.Errorf("copying %s:%s: %w", repo, t, err)
			}
			targets[t] = d.Digest
			if err := c.manifest(ctx, repo, d.Digest, ""); err != nil {
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
		for _, t := range tags {
			if err := c.tag(ctx, repo, t, targets[t]); err != nil {
				return nil, fmt.Errorf("copying %s:%s: %w", repo, t, err)
			}
		}
	}
	return c.res, nil
}

func (c *copier) tag(ctx context.Context, repo, tag string, dgst v1.Hash) error {
	_, d, err := c.dst.Manifest(ctx, repo, dgst)
	if err != nil {
		return err
	}
	if err := c.dst.Tag(ctx, repo, tag, d); err != nil {
		return err
	}
	c.res.Tags = append(c.res.Tags, repo+":"+tag)
	c.emit(CopyEvent{Phase: "tag", Name: repo + ":" + tag})
	return nil
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
