package registry

import (
	"context"
	"errors"
	"fmt"
	"sort"
	"strings"
	"time"

	"cloud.google.com/go/storage"
	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Deletion in a bucket: every object is deleted with a generation
// precondition (the generation read just before), so a tag moved, or an
// object rewritten, between the check and the delete is not removed: the
// delete fails with 412 and the store reports a conflict. Order for a
// manifest: its referrer link, then the manifest object, so a link never
// names a missing manifest. The repository marker stays (the repository
// then lists no manifests).

var _ Deleter = (*GCS)(nil)

// SharesBlobs is true: PREFIX/blobs holds the blobs of every repository.
func (g *GCS) SharesBlobs() bool { return true }

// deleteObject deletes key if its generation is gen. A missing object is
// fine; another generation is a conflict.
func (g *GCS) deleteObject(ctx context.Context, key string, gen int64) error {
	return g.deleteObjectIf(ctx, key, storage.Conditions{GenerationMatch: gen})
}

// deleteObjectIf deletes key under cond. A missing object is fine; a
// failed precondition is a conflict.
func (g *GCS) deleteObjectIf(ctx context.Context, key string, cond storage.Conditions) error {
	err := g.bucket.Object(key).If(cond).Delete(ctx)
	switch {
	case err == nil, errors.Is(err, storage.ErrObjectNotExist):
		return nil
	case isPrecondition(err):
		return errkind.New(errkind.Conflict, "object %s was rewritten while it was being deleted: %w", key, ErrConflict)
	}
	return fmt.Errorf("deleting %s: %w", key, gcsErr(err))
}

// DeleteTag removes repo:tag if it points at want, by a delete with the
// generation of the tag object it read: a tag moved meanwhile stays
// (ErrConflict).
func (g *GCS) DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	if err := checkDeleteTag(repo, tag, want); err != nil {
		return err
	}
	if err := g.deleteTag(ctx, repo, tag, want); err != nil {
		return fmt.Errorf("removing tag %s:%s: %w", repo, tag, err)
	}
	return nil
}

func (g *GCS) deleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	if ValidateTag(HeadTag(tag)) == nil {
		_, _, _, err := g.readTag(ctx, repo, HeadTag(tag))
		switch {
		case err == nil:
			return releasedTagError(repo, tag)
		case !errors.Is(err, ErrNotFound):
			return fmt.Errorf("checking whether %s:%s has a release log: %w", repo, tag, err)
		}
	}
	cur, gen, _, err := g.readTag(ctx, repo, tag)
	if err != nil {
		return err
	}
	if cur.Digest != want {
		return errkind.New(errkind.Conflict, "tag %s:%s points at %s, not %s: %w", repo, tag, cur.Digest, want, ErrConflict)
	}
	err = g.bucket.Object(g.tagKey(repo, tag)).If(storage.Conditions{GenerationMatch: gen}).Delete(ctx)
	switch {
	case err == nil:
		return nil
	case errors.Is(err, storage.ErrObjectNotExist):
		return notFound("tag %s:%s", repo, tag)
	case isPrecondition(err):
		return errkind.New(errkind.Conflict, "tag %s:%s moved while it was being removed: %w", repo, tag, ErrConflict)
	}
	return gcsErr(err)
}

// tagsNaming returns repo's tags that point at dgst (one read per tag,
// eight at a time).
func (g *GCS) tagsNaming(ctx context.Context, repo string, dgst v1.Hash) ([]string, error) {
	tags, err := g.Tags(ctx, repo)
	if err != nil {
		return nil, err
	}
	return tagsPointingAt(ctx, tags, dgst, func(ctx context.Context, t string) (v1.Hash, error) {
		d, _, _, err := g.readTag(ctx, repo, t)
		return d.Digest, err
	})
}

// DeleteManifest removes manifest dgst of repo: its referrer link, then
// the manifest object (generation precondition). It refuses a release
// record and a manifest a tag names (one read per tag of repo).
func (g *GCS) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	if err := g.deleteManifest(ctx, repo, dgst, nil); err != nil {
		return fmt.Errorf("removing manifest %s from %s: %w", dgst, repo, err)
	}
	return nil
}

// deleteManifest removes manifest dgst of repo; when version is not nil,
// only while the manifest object has that version (gcs_refresh.go).
func (g *GCS) deleteManifest(ctx context.Context, repo string, dgst v1.Hash, version *string) error {
	key := g.manifestKey(repo, dgst)
	a, err := g.bucket.Object(key).Attrs(ctx)
	if errors.Is(err, storage.ErrObjectNotExist) {
		return nil
	}
	if err != nil {
		return gcsErr(err)
	}
	if version != nil && gcsVersion(a) != *version {
		return inUseError(fmt.Sprintf("manifest %s of %s", dgst, repo))
	}
	if at := a.Metadata["artifactType"]; IsReleaseLogType(at) {
		return releaseLogError(repo, dgst, at)
	}
	tags, err := g.tagsNaming(ctx, repo, dgst)
	if err != nil {
		return err
	}
	if len(tags) > 0 {
		return taggedError(repo, dgst, tags)
	}
	// The referrer link goes first (a link never names a missing
	// manifest); when the manifest then stays (reused meanwhile), the link
	// is written back.
	var link string
	var linkBytes []byte
	if s := a.Metadata["subject"]; s != "" {
		if subject, err := v1.NewHash(s); err == nil && checkDigest(subject) == nil {
			link = g.referrersKey(repo, subject) + dgst.Hex
			b, la, err := g.readSmall(ctx, link, maxLinkSize)
			switch {
			case errors.Is(err, ErrNotFound):
				link = ""
			case err != nil:
				return err
			default:
				linkBytes = b
				if err := g.deleteObject(ctx, link, la.Generation); err != nil {
					return err
				}
			}
		}
	}
	cond := storage.Conditions{GenerationMatch: a.Generation}
	if version != nil {
		cond.MetagenerationMatch = a.Metageneration
	}
	err = g.deleteObjectIf(ctx, key, cond)
	if errors.Is(err, ErrConflict) {
		if link != "" {
			if werr := g.writeSmall(ctx, link, linkBytes, "application/json", nil, &storage.Conditions{DoesNotExist: true}); werr != nil && !isPrecondition(werr) {
				return errors.Join(err, fmt.Errorf("writing back the referrer link of %s: %w", dgst, gcsErr(werr)))
			}
		}
		if version != nil {
			return inUseError(fmt.Sprintf("manifest %s of %s", dgst, repo))
		}
	}
	return err
}

// maxLinkSize bounds a referrer link read back before its removal (a
// descriptor with the manifest's annotations).
const maxLinkSize = MaxManifestSize

// DeleteBlob removes blob dgst (shared by every repository) with the
// generation it has now: a blob rewritten meanwhile (ErrConflict) stays.
func (g *GCS) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	return g.deleteBlob(ctx, dgst, nil)
}

// deleteBlob removes blob dgst; when version is not nil, only while the
// object has that version (gcs_refresh.go).
func (g *GCS) deleteBlob(ctx context.Context, dgst v1.Hash, version *string) error {
	key := g.blobKey(dgst)
	a, err := g.bucket.Object(key).Attrs(ctx)
	if errors.Is(err, storage.ErrObjectNotExist) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("removing blob %s: %w", dgst, gcsErr(err))
	}
	cond := storage.Conditions{GenerationMatch: a.Generation}
	if version != nil {
		if gcsVersion(a) != *version {
			return inUseError("blob " + dgst.String())
		}
		cond.MetagenerationMatch = a.Metageneration
	}
	if err := g.deleteObjectIf(ctx, key, cond); err != nil {
		if version != nil && errors.Is(err, ErrConflict) {
			return inUseError("blob " + dgst.String())
		}
		return fmt.Errorf("removing blob %s: %w", dgst, err)
	}
	return nil
}

// Blobs lists every blob of the store (repo is only checked), with the
// time its object was last written.
func (g *GCS) Blobs(ctx context.Context, repo string) ([]BlobInfo, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	prefix := g.key("blobs", "sha256") + "/"
	out := []BlobInfo{}
	err := g.eachObject(ctx, prefix, "listing blobs", func(a *storage.ObjectAttrs) error {
		if h := strings.TrimPrefix(a.Name, prefix); hexPattern.MatchString(h) {
			out = append(out, BlobInfo{Digest: v1.Hash{Algorithm: "sha256", Hex: h}, Size: a.Size, Modified: gcsTime(a), Version: gcsVersion(a)})
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Digest.Hex < out[j].Digest.Hex })
	return out, nil
}

// ManifestTimes returns when each manifest object of repo was created or
// last reused (gcsTime).
func (g *GCS) ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	prefix := g.key("repositories", repo, "_manifests", "sha256") + "/"
	out := map[v1.Hash]time.Time{}
	err := g.eachObject(ctx, prefix, "listing manifests of "+repo, func(a *storage.ObjectAttrs) error {
		if h := strings.TrimPrefix(a.Name, prefix); hexPattern.MatchString(h) {
			out[v1.Hash{Algorithm: "sha256", Hex: h}] = gcsTime(a)
		}
		return nil
	})
	return out, err
}
