package registry

import (
	"context"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	"cloud.google.com/go/storage"
	v1 "github.com/google/go-containerregistry/pkg/v1"
)

// Reuse and conditional removal in a bucket. A writer that reuses a blob
// or manifest object refreshes it: a metadata update (PATCH) that sets
// refreshedKey to the writer's time. The update bumps the object's
// metageneration and its updated time; the version of an object is its
// generation, metageneration and refreshedKey. A collector removes an
// object only while its version is the one it listed: it reads the
// object's attributes, compares the version, and deletes with
// ifGenerationMatch and ifMetagenerationMatch set to what it read
// (cloud.google.com/storage/docs/json_api/v1/objects/delete). So:
//   - a refresh before the collector's read: the version differs, the
//     object stays (ErrInUse);
//   - a refresh between the read and the delete: the metageneration moved,
//     the delete fails with 412, the object stays (ErrInUse);
//   - a refresh after the delete: the object is gone, the update fails
//     with 404 (ErrNotFound), and the writer uploads it again.
//
// Each step is one request the bucket applies atomically, so there is no
// interleaving left: a writer told "present" holds an object no collector
// that judged it earlier can delete. refreshedKey is in the version too
// because an emulator may not bump metagenerations (fake-gcs-server keeps
// 1): there the version still changes with every refresh.

var (
	_ Refresher        = (*GCS)(nil)
	_ VersionedDeleter = (*GCS)(nil)
)

// refreshedKey is the object metadata key a refresh sets.
const refreshedKey = "modelgate-reused"

// gcsVersion is an object's version (see above).
func gcsVersion(a *storage.ObjectAttrs) string {
	return strconv.FormatInt(a.Generation, 10) + "." + strconv.FormatInt(a.Metageneration, 10) + "." + a.Metadata[refreshedKey]
}

// gcsTime is when an object was written or last reused: its updated time,
// or the refresh's own time when later (an emulator may not move updated
// on a metadata update).
func gcsTime(a *storage.ObjectAttrs) time.Time {
	t := a.Updated
	if r, err := time.Parse(time.RFC3339Nano, a.Metadata[refreshedKey]); err == nil && r.After(t) {
		t = r
	}
	return t
}

// refreshObject refreshes key: ErrNotFound when there is no such object.
// A refresh is safe to repeat (a second one only moves the version
// again), so the client library retries it on transient failures as it
// does reads, although an update without preconditions is not one it
// retries by default.
func (g *GCS) refreshObject(ctx context.Context, key string) (*storage.ObjectAttrs, error) {
	obj := g.bucket.Object(key).Retryer(storage.WithPolicy(storage.RetryAlways))
	a, err := obj.Update(ctx, storage.ObjectAttrsToUpdate{
		Metadata: map[string]string{refreshedKey: time.Now().UTC().Format(time.RFC3339Nano)},
	})
	if err != nil {
		return nil, gcsErr(err)
	}
	return a, nil
}

// RefreshBlob implements Refresher: a metadata update of the blob object.
func (g *GCS) RefreshBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	if err := ValidateRepository(repo); err != nil {
		return 0, err
	}
	if err := checkDigest(dgst); err != nil {
		return 0, err
	}
	return g.refreshBlob(ctx, dgst)
}

func (g *GCS) refreshBlob(ctx context.Context, dgst v1.Hash) (int64, error) {
	a, err := g.refreshObject(ctx, g.blobKey(dgst))
	if errors.Is(err, ErrNotFound) {
		return 0, notFound("blob %s", dgst)
	}
	if err != nil {
		return 0, fmt.Errorf("refreshing blob %s: %w", dgst, err)
	}
	return a.Size, nil
}

// RefreshManifest implements Refresher: a metadata update of the manifest
// object (which keeps its other metadata), then the manifest read back for
// its descriptor. A manifest whose referrer link is missing is not found:
// putting it again writes the link.
func (g *GCS) RefreshManifest(ctx context.Context, repo string, dgst v1.Hash) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	if err := checkDigest(dgst); err != nil {
		return v1.Descriptor{}, err
	}
	a, err := g.refreshObject(ctx, g.manifestKey(repo, dgst))
	if errors.Is(err, ErrNotFound) {
		return v1.Descriptor{}, notFound("manifest %s in repository %s", dgst, repo)
	}
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("refreshing manifest %s of %s: %w", dgst, repo, err)
	}
	if s := a.Metadata["subject"]; s != "" {
		if subject, err := v1.NewHash(s); err == nil && checkDigest(subject) == nil {
			_, err := g.bucket.Object(g.referrersKey(repo, subject) + dgst.Hex).Attrs(ctx)
			if errors.Is(err, storage.ErrObjectNotExist) {
				return v1.Descriptor{}, notFound("manifest %s in repository %s (its referrer link is missing)", dgst, repo)
			}
			if err != nil {
				return v1.Descriptor{}, gcsErr(err)
			}
		}
	}
	_, desc, err := g.Manifest(ctx, repo, dgst)
	return desc, err
}

// ManifestStamps implements VersionedDeleter.
func (g *GCS) ManifestStamps(ctx context.Context, repo string) (map[v1.Hash]Stamp, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	prefix := g.key("repositories", repo, "_manifests", "sha256") + "/"
	out := map[v1.Hash]Stamp{}
	err := g.eachObject(ctx, prefix, "listing manifests of "+repo, func(a *storage.ObjectAttrs) error {
		if h := strings.TrimPrefix(a.Name, prefix); hexPattern.MatchString(h) {
			out[v1.Hash{Algorithm: "sha256", Hex: h}] = Stamp{Time: gcsTime(a), Version: gcsVersion(a)}
		}
		return nil
	})
	return out, err
}

// DeleteManifestIf implements VersionedDeleter (see above).
func (g *GCS) DeleteManifestIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	if err := g.deleteManifest(ctx, repo, dgst, &version); err != nil {
		return fmt.Errorf("removing manifest %s from %s: %w", dgst, repo, err)
	}
	return nil
}

// DeleteBlobIf implements VersionedDeleter (see above).
func (g *GCS) DeleteBlobIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	return g.deleteBlob(ctx, dgst, &version)
}
