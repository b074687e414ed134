package registry

import (
	"context"
	"errors"
	"fmt"
	"os"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
)

// The wrappers' Deleter abilities: each passes deletions through to the
// wrapped store and does what its wrapper must for them (retry, inject
// faults, forget what it kept of what was removed). A wrapper's deleter
// has VersionedDeleter's methods too, which fail with
// errors.ErrUnsupported when the wrapped store lacks them.

// wrapDeleter is a wrapper's deleter.
type wrapDeleter interface {
	Deleter
	VersionedDeleter
}

// versioned returns s's VersionedDeleter, or an error wrapping
// errors.ErrUnsupported.
func versioned(s Store) (VersionedDeleter, error) {
	if v, ok := s.(VersionedDeleter); ok {
		return v, nil
	}
	return nil, fmt.Errorf("store %s removes nothing conditionally: %w", s, errors.ErrUnsupported)
}

type retryDeleter struct{ r *retryStore }

func (w retryDeleter) inner() Deleter { return w.r.s.(Deleter) }

// DeleteTag retries a transient failure. A retry that finds the tag gone
// after an earlier attempt failed transiently (and so may have landed)
// reports success: the outcome asked for holds, and who removed the tag
// cannot be told apart (as for SwapTag).
func (w retryDeleter) DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	failedBefore := false
	return w.r.do(ctx, "removing tag "+repo+":"+tag, func() error {
		err := w.inner().DeleteTag(ctx, repo, tag, want)
		if errors.Is(err, ErrNotFound) && failedBefore {
			return nil
		}
		if IsTransient(err) {
			failedBefore = true
		}
		return err
	}, nil)
}

// DeleteManifest and DeleteBlob are idempotent, so they are retried as
// they are.
func (w retryDeleter) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	return w.r.do(ctx, "removing manifest "+repo+"@"+dgst.String(), func() error {
		return w.inner().DeleteManifest(ctx, repo, dgst)
	}, nil)
}

func (w retryDeleter) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	return w.r.do(ctx, "removing blob "+dgst.String(), func() error {
		return w.inner().DeleteBlob(ctx, repo, dgst)
	}, nil)
}

func (w retryDeleter) Blobs(ctx context.Context, repo string) (out []BlobInfo, err error) {
	err = w.r.do(ctx, "listing blobs", func() error {
		out, err = w.inner().Blobs(ctx, repo)
		return err
	}, nil)
	return out, err
}

func (w retryDeleter) ManifestTimes(ctx context.Context, repo string) (out map[v1.Hash]time.Time, err error) {
	err = w.r.do(ctx, "listing manifest times of "+repo, func() error {
		out, err = w.inner().ManifestTimes(ctx, repo)
		return err
	}, nil)
	return out, err
}

func (w retryDeleter) SharesBlobs() bool { return w.inner().SharesBlobs() }

// DeleteManifestIf and DeleteBlobIf are idempotent too: a retry after an
// attempt that landed finds nothing to remove.
func (w retryDeleter) DeleteManifestIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(w.r.s)
	if err != nil {
		return err
	}
	return w.r.do(ctx, "removing manifest "+repo+"@"+dgst.String(), func() error {
		return v.DeleteManifestIf(ctx, repo, dgst, version)
	}, nil)
}

func (w retryDeleter) DeleteBlobIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(w.r.s)
	if err != nil {
		return err
	}
	return w.r.do(ctx, "removing blob "+dgst.String(), func() error {
		return v.DeleteBlobIf(ctx, repo, dgst, version)
	}, nil)
}

func (w retryDeleter) ManifestStamps(ctx context.Context, repo string) (out map[v1.Hash]Stamp, err error) {
	v, err := versioned(w.r.s)
	if err != nil {
		return nil, err
	}
	err = w.r.do(ctx, "listing manifest stamps of "+repo, func() error {
		out, err = v.ManifestStamps(ctx, repo)
		return err
	}, nil)
	return out, err
}

type faultyDeleter struct{ f *faultyStore }

func (w faultyDeleter) inner() Deleter { return w.f.s.(Deleter) }

func (w faultyDeleter) DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	if err := w.f.fail("delete tag"); err != nil {
		return err
	}
	return w.inner().DeleteTag(ctx, repo, tag, want)
}

func (w faultyDeleter) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	if err := w.f.fail("delete manifest"); err != nil {
		return err
	}
	return w.inner().DeleteManifest(ctx, repo, dgst)
}

func (w faultyDeleter) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	if err := w.f.fail("delete blob"); err != nil {
		return err
	}
	return w.inner().DeleteBlob(ctx, repo, dgst)
}

func (w faultyDeleter) Blobs(ctx context.Context, repo string) ([]BlobInfo, error) {
	if err := w.f.fail("blobs"); err != nil {
		return nil, err
	}
	return w.inner().Blobs(ctx, repo)
}

func (w faultyDeleter) ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error) {
	if err := w.f.fail("manifest times"); err != nil {
		return nil, err
	}
	return w.inner().ManifestTimes(ctx, repo)
}

func (w faultyDeleter) SharesBlobs() bool { return w.inner().SharesBlobs() }

func (w faultyDeleter) DeleteManifestIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(w.f.s)
	if err != nil {
		return err
	}
	if err := w.f.fail("delete manifest"); err != nil {
		return err
	}
	return v.DeleteManifestIf(ctx, repo, dgst, version)
}

func (w faultyDeleter) DeleteBlobIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(w.f.s)
	if err != nil {
		return err
	}
	if err := w.f.fail("delete blob"); err != nil {
		return err
	}
	return v.DeleteBlobIf(ctx, repo, dgst, version)
}

func (w faultyDeleter) ManifestStamps(ctx context.Context, repo string) (map[v1.Hash]Stamp, error) {
	v, err := versioned(w.f.s)
	if err != nil {
		return nil, err
	}
	if err := w.f.fail("manifest times"); err != nil {
		return nil, err
	}
	return v.ManifestStamps(ctx, repo)
}

// memoDeleter drops the memo's copies of what it removes: a removed
// manifest or blob must not be served from memory afterwards. For a store
// whose blobs are shared, a blob is dropped under every repository, and
// so is a manifest whose bytes (a blob there) may have gone.
type memoDeleter struct{ m *memoStore }

func (w memoDeleter) inner() Deleter { return w.m.Store.(Deleter) }

func (w memoDeleter) DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	return w.inner().DeleteTag(ctx, repo, tag, want)
}

func (w memoDeleter) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	w.m.forget("m ", repo, dgst, w.inner().SharesBlobs())
	err := w.inner().DeleteManifest(ctx, repo, dgst)
	w.m.forget("m ", repo, dgst, w.inner().SharesBlobs())
	return err
}

func (w memoDeleter) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	w.m.forget("b ", repo, dgst, w.inner().SharesBlobs())
	err := w.inner().DeleteBlob(ctx, repo, dgst)
	w.m.forget("b ", repo, dgst, w.inner().SharesBlobs())
	return err
}

func (w memoDeleter) Blobs(ctx context.Context, repo string) ([]BlobInfo, error) {
	return w.inner().Blobs(ctx, repo)
}

func (w memoDeleter) ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error) {
	return w.inner().ManifestTimes(ctx, repo)
}

func (w memoDeleter) SharesBlobs() bool { return w.inner().SharesBlobs() }

func (w memoDeleter) DeleteManifestIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(w.m.Store)
	if err != nil {
		return err
	}
	w.m.forget("m ", repo, dgst, w.inner().SharesBlobs())
	err = v.DeleteManifestIf(ctx, repo, dgst, version)
	w.m.forget("m ", repo, dgst, w.inner().SharesBlobs())
	return err
}

func (w memoDeleter) DeleteBlobIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(w.m.Store)
	if err != nil {
		return err
	}
	w.m.forget("b ", repo, dgst, w.inner().SharesBlobs())
	err = v.DeleteBlobIf(ctx, repo, dgst, version)
	w.m.forget("b ", repo, dgst, w.inner().SharesBlobs())
	return err
}

func (w memoDeleter) ManifestStamps(ctx context.Context, repo string) (map[v1.Hash]Stamp, error) {
	v, err := versioned(w.m.Store)
	if err != nil {
		return nil, err
	}
	return v.ManifestStamps(ctx, repo)
}

// forget drops the memo's item of kind ("m " or "b ") for repo@dgst, or
// for dgst under every repository when all.
func (m *memoStore) forget(kind, repo string, dgst v1.Hash, all bool) {
	m.mu.Lock()
	defer m.mu.Unlock()
	drop := func(key string) {
		if e, ok := m.items[key]; ok {
			m.order.Remove(e)
			delete(m.items, key)
			m.used -= int64(len(e.Value.(*memoItem).raw))
		}
	}
	if !all {
		drop(kind + repo + "@" + dgst.String())
		return
	}
	suffix := "@" + dgst.String()
	for key := range m.items {
		if strings.HasSuffix(key, suffix) {
			drop(key)
		}
	}
}

// cachedDeleter removes a removed blob from the blob cache too, so that
// Blob does not serve it from the cache afterwards.
type cachedDeleter struct{ w *cachedStore }

func (d cachedDeleter) inner() Deleter { return d.w.Store.(Deleter) }

func (d cachedDeleter) DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	return d.inner().DeleteTag(ctx, repo, tag, want)
}

func (d cachedDeleter) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	return d.inner().DeleteManifest(ctx, repo, dgst)
}

func (d cachedDeleter) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	err := d.inner().DeleteBlob(ctx, repo, dgst)
	if err == nil {
		d.w.c.Forget(dgst)
	}
	return err
}

func (d cachedDeleter) Blobs(ctx context.Context, repo string) ([]BlobInfo, error) {
	return d.inner().Blobs(ctx, repo)
}

func (d cachedDeleter) ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error) {
	return d.inner().ManifestTimes(ctx, repo)
}

func (d cachedDeleter) SharesBlobs() bool { return d.inner().SharesBlobs() }

func (d cachedDeleter) DeleteManifestIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(d.w.Store)
	if err != nil {
		return err
	}
	return v.DeleteManifestIf(ctx, repo, dgst, version)
}

func (d cachedDeleter) DeleteBlobIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	v, err := versioned(d.w.Store)
	if err != nil {
		return err
	}
	err = v.DeleteBlobIf(ctx, repo, dgst, version)
	if err == nil {
		d.w.c.Forget(dgst)
	}
	return err
}

func (d cachedDeleter) ManifestStamps(ctx context.Context, repo string) (map[v1.Hash]Stamp, error) {
	v, err := versioned(d.w.Store)
	if err != nil {
		return nil, err
	}
	return v.ManifestStamps(ctx, repo)
}

// Forget removes the cached copy of blob dgst, if any (after the blob was
// removed from its store).
func (c *BlobCache) Forget(dgst v1.Hash) {
	if dgst.Algorithm == "sha256" && isDigestHex(dgst.Hex) {
		os.Remove(c.path(dgst))
	}
}
