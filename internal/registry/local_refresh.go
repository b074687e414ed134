package registry

import (
	"context"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"strconv"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
)

// Reuse and conditional removal in a local store. An item's stamp is its
// file's modification time: a blob's file, a manifest's side file (its
// blob's, for a manifest an earlier store version recorded only in
// index.json). Its version is that time in nanoseconds. A writer that
// reuses an item sets the time to now (refreshFile); a collector removes
// an item only while its version is the one it saw (removeBlob,
// removeSide, where the interleavings are argued).

var (
	_ Refresher        = (*Local)(nil)
	_ VersionedDeleter = (*Local)(nil)
)

// localVersion is a file's version: its modification time in nanoseconds.
func localVersion(fi fs.FileInfo) string { return strconv.FormatInt(fi.ModTime().UnixNano(), 10) }

// removalHook, when set (tests only), is called at the steps of a
// conditional removal: after the version was checked, before anything is
// moved (stepRemovalChecked), and after the item was moved aside
// (stepRemovalMoved). It runs under the store's lock.
var removalHook func(step string)

const (
	stepRemovalChecked = "removal-checked"
	stepRemovalMoved   = "removal-moved"
)

func removalStep(name string) {
	if removalHook != nil {
		removalHook(name)
	}
}

// refreshFile sets p's times to now and reports whether p, afterwards,
// names a regular file with that very time: the file the refresh changed
// is still the one at p. It is false (fi nil) when p is missing, and
// false with fi when p names another file (a removal moved the refreshed
// one aside and a writer put a new one, or a file system that keeps
// coarser times).
func refreshFile(p string) (fi fs.FileInfo, ok bool, err error) {
	now := time.Now()
	if err := os.Chtimes(p, now, now); err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return nil, false, nil
		}
		return nil, false, err
	}
	fi, err = os.Lstat(p)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, false, nil
	}
	if err != nil {
		return nil, false, err
	}
	return fi, fi.Mode().IsRegular() && fi.ModTime().Equal(now), nil
}

// refresh refreshes the file p and returns its info, or an error wrapping
// fs.ErrNotExist when there is none. When the refresh cannot tell (p
// missing, or not with the refresh's time) and locked, it tries again
// under the store's lock, where no removal is half done: a file moved
// aside has been put back or removed by then, and whatever file p names
// then was refreshed now or written since. Without locked, such a file
// counts as missing: for callers that then write it (a push uploads the
// blob), which is always safe. Callers do not hold the lock.
func (l *Local) refresh(ctx context.Context, p string, locked bool) (fs.FileInfo, error) {
	fi, ok, err := refreshFile(p)
	if ok || err != nil {
		return fi, err
	}
	if !locked {
		return nil, fs.ErrNotExist
	}
	unlock, err := l.lock(ctx)
	if err != nil {
		return nil, err
	}
	defer unlock()
	fi, _, err = refreshFile(p)
	if err != nil {
		return nil, err
	}
	if fi == nil {
		return nil, fs.ErrNotExist
	}
	return fi, nil
}

// refreshBlob refreshes blob dgst and returns its size: an error wrapping
// ErrNotFound when it is absent (see refresh for locked).
func (l *Local) refreshBlob(ctx context.Context, dgst v1.Hash, locked bool) (int64, error) {
	fi, err := l.refresh(ctx, l.blobPath(dgst), locked)
	if errors.Is(err, fs.ErrNotExist) {
		return 0, notFound("blob %s", dgst)
	}
	if err != nil {
		return 0, fmt.Errorf("refreshing blob %s: %w", dgst, err)
	}
	if !fi.Mode().IsRegular() {
		return 0, fmt.Errorf("refreshing blob %s: %s is not a regular file", dgst, l.relPath(l.blobPath(dgst)))
	}
	return fi.Size(), nil
}

// RefreshBlob implements Refresher: blob dgst's file time becomes now. A
// blob the refresh cannot vouch for is not found: the writer uploads it.
func (l *Local) RefreshBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	if err := ValidateRepository(repo); err != nil {
		return 0, err
	}
	if err := checkDigest(dgst); err != nil {
		return 0, err
	}
	return l.refreshBlob(ctx, dgst, false)
}

// RefreshManifest implements Refresher: the time of manifest dgst's side
// file in repo becomes now (its blob's, for a manifest recorded only in
// index.json). A manifest whose referrer side file or blob is missing is
// not found: putting it again repairs it.
func (l *Local) RefreshManifest(ctx context.Context, repo string, dgst v1.Hash) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	if err := checkDigest(dgst); err != nil {
		return v1.Descriptor{}, err
	}
	side := l.manifestEntryPath(repo, dgst)
	_, err := l.refresh(ctx, side, false)
	if errors.Is(err, fs.ErrNotExist) {
		// Recorded only in index.json (a tag, or an entry of an earlier
		// store version): the blob is its stamp.
		idx, ierr := l.readIndex()
		if ierr != nil {
			return v1.Descriptor{}, ierr
		}
		if findEntry(idx, repo, dgst) < 0 {
			return v1.Descriptor{}, notFound("manifest %s in repository %s", dgst, repo)
		}
		entry, lerr := l.lookupManifest(idx, repo, dgst)
		if lerr != nil {
			return v1.Descriptor{}, lerr
		}
		if _, err := l.refreshBlob(ctx, dgst, false); err != nil {
			return v1.Descriptor{}, err
		}
		return plainDescriptor(entry), nil
	}
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("refreshing manifest %s of %s: %w", dgst, repo, err)
	}
	entry, err := l.readEntry(side, repo, dgst)
	if err != nil {
		return v1.Descriptor{}, err
	}
	if !l.recorded(repo, entry) {
		return v1.Descriptor{}, notFound("manifest %s in repository %s (its referrer record is missing)", dgst, repo)
	}
	if size, err := l.statBlob(dgst); err != nil || size != entry.Size {
		return v1.Descriptor{}, notFound("manifest %s in repository %s (its blob is missing)", dgst, repo)
	}
	return plainDescriptor(entry), nil
}

// ManifestStamps implements VersionedDeleter: ManifestTimes with each
// file's version.
func (l *Local) ManifestStamps(ctx context.Context, repo string) (map[v1.Hash]Stamp, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	out := map[v1.Hash]Stamp{}
	dir := l.manifestsPath(repo)
	names, err := readDirNames(dir)
	if err != nil {
		return nil, err
	}
	for _, n := range names {
		if !isDigestHex(n) {
			continue
		}
		fi, err := os.Lstat(filepath.Join(dir, n))
		if errors.Is(err, fs.ErrNotExist) {
			continue
		}
		if err != nil {
			return nil, fmt.Errorf("listing manifests of %s: %w", repo, err)
		}
		out[v1.Hash{Algorithm: "sha256", Hex: n}] = Stamp{Time: fi.ModTime(), Version: localVersion(fi)}
	}
	idx, err := l.readIndex()
	if err != nil {
		return nil, err
	}
	for _, d := range idx.Manifests {
		if _, ok := out[d.Digest]; ok || d.Annotations[annotationRepository] != repo || checkDigest(d.Digest) != nil {
			continue
		}
		if fi, err := os.Lstat(l.blobPath(d.Digest)); err == nil {
			out[d.Digest] = Stamp{Time: fi.ModTime(), Version: localVersion(fi)}
		}
	}
	return out, nil
}
