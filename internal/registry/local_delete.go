package registry

import (
	"context"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

var _ Deleter = (*Local)(nil)

// SharesBlobs is true: blobs/sha256 holds the blobs of every repository.
func (l *Local) SharesBlobs() bool { return true }

// DeleteTag removes repo:tag if it points at want: one atomic replace of
// index.json under the store's lock, where the release-log check runs
// too. The manifest stays recorded in repo.
func (l *Local) DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	if err := checkDeleteTag(repo, tag, want); err != nil {
		return err
	}
	ref := refName(repo, tag)
	err := l.updateIndex(ctx, func(idx *v1.IndexManifest) (bool, error) {
		if ValidateTag(HeadTag(tag)) == nil && findTag(idx, repo, HeadTag(tag)) >= 0 {
			return false, releasedTagError(repo, tag)
		}
		cur := findTag(idx, repo, tag)
		if cur < 0 {
			return false, notFound("tag %s", ref)
		}
		if got := idx.Manifests[cur].Digest; got != want {
			return false, errkind.New(errkind.Conflict, "tag %s points at %s, not %s: %w", ref, got, want, ErrConflict)
		}
		kept := idx.Manifests[:0]
		for _, d := range idx.Manifests {
			if !(d.Annotations[annotationRepository] == repo && d.Annotations[annotationRefName] == ref) {
				kept = append(kept, d)
			}
		}
		idx.Manifests = kept
		return true, nil
	})
	if err != nil {
		return fmt.Errorf("removing tag %s: %w", ref, err)
	}
	return nil
}

// releasedTagError refuses the removal of a tag that has a release log.
func releasedTagError(repo, tag string) error {
	return errkind.New(errkind.Unauthorized, "%s:%s has a release log: a released tag is never removed (`modelgate rollback` moves it back, `modelgate log` shows its history): %w", repo, tag, ErrGuarded)
}

// DeleteManifest removes manifest dgst from repo under the store's lock,
// in this order, each step durable before the next: index.json entries
// of an earlier store version that record it (untagged), its referrer
// side file, its manifest side file, and then, when no repository
// records the manifest any more, its blob. A crash after any step leaves
// a store that Scrub finds undamaged (at most a manifest side file
// without its referrer file, or an unrecorded blob: hints), and the next
// call finishes the job (an unrecorded manifest blob is then a blob that
// Blobs lists and DeleteBlob removes).
func (l *Local) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	unlock, err := l.lock(ctx)
	if err != nil {
		return err
	}
	defer unlock()
	if err := l.deleteManifestLocked(repo, dgst); err != nil {
		return fmt.Errorf("removing manifest %s from %s: %w", dgst, repo, err)
	}
	return nil
}

func (l *Local) deleteManifestLocked(repo string, dgst v1.Hash) error {
	idx, err := l.readIndex()
	if err != nil {
		return err
	}
	var tags []string
	prefix := repo + ":"
	for _, d := range idx.Manifests {
		if d.Digest != dgst || d.Annotations[annotationRepository] != repo {
			continue
		}
		if t, ok := strings.CutPrefix(d.Annotations[annotationRefName], prefix); ok {
			tags = append(tags, t)
		}
	}
	if len(tags) > 0 {
		return taggedError(repo, dgst, tags)
	}
	entry, err := l.lookupManifest(idx, repo, dgst)
	if errors.Is(err, ErrNotFound) {
		return nil
	}
	if err != nil {
		return err
	}
	if IsReleaseLogType(entry.ArtifactType) {
		return releaseLogError(repo, dgst, entry.ArtifactType)
	}

	// 1. Untagged index.json entries (left by an earlier store version).
	if findEntry(idx, repo, dgst) >= 0 {
		next := *idx
		next.Manifests = nil
		for _, d := range idx.Manifests {
			if !(d.Digest == dgst && d.Annotations[annotationRepository] == repo && d.Annotations[annotationRefName] == "") {
				next.Manifests = append(next.Manifests, d)
			}
		}
		if len(next.Manifests) != len(idx.Manifests) {
			if err := l.writeIndex(&next); err != nil {
				return err
			}
		}
	}
	// 2. The referrer side file, then 3. the manifest side file: a
	// referrer file never names a manifest the repository does not record.
	if s := entry.Annotations[annotationSubject]; s != "" {
		if subject, err := v1.NewHash(s); err == nil && checkDigest(subject) == nil {
			if err := l.removeFile(l.referrerEntryPath(repo, subject, entry.ArtifactType, dgst)); err != nil {
				return err
			}
		}
	}
	if err := l.removeFile(l.manifestEntryPath(repo, dgst)); err != nil {
		return err
	}
	// 4. The bytes, unless another repository records the manifest.
	_, err = l.removeBlobUnlessRecorded(dgst)
	return err
}

// removeFile removes a side file durably (a missing one is fine) and
// forgets its cached copy.
func (l *Local) removeFile(p string) error {
	l.entries.drop(p)
	if err := os.Remove(p); err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return nil
		}
		return fmt.Errorf("removing %s: %w", l.relPath(p), err)
	}
	if err := syncDir(filepath.Dir(p)); err != nil {
		return fmt.Errorf("removing %s: %w", l.relPath(p), err)
	}
	return nil
}

// recordedAnywhere reports whether some repository records manifest dgst
// (a side file, or an index.json entry).
func (l *Local) recordedAnywhere(dgst v1.Hash) (bool, error) {
	idx, err := l.readIndex()
	if err != nil {
		return false, err
	}
	for _, d := range idx.Manifests {
		if d.Digest == dgst && d.Annotations[annotationRepository] != "" {
			return true, nil
		}
	}
	ents, err := os.ReadDir(l.path(reposDir))
	if err != nil && !errors.Is(err, fs.ErrNotExist) {
		return false, fmt.Errorf("listing repositories: %w", err)
	}
	for _, e := range ents {
		if _, err := os.Lstat(filepath.Join(l.path(reposDir), e.Name(), manifestsSub, dgst.Hex)); err == nil {
			return true, nil
		}
	}
	return false, nil
}

// removeBlobUnlessRecorded removes blob dgst unless a repository records
// it as a manifest. Callers hold the lock. Side files are written without
// the lock, so the blob is first moved aside into .modelgate/tmp, then
// the records are checked, then it is removed or, when a manifest put
// meanwhile recorded it, moved back (a put that found it missing wrote
// the same bytes again, which moving back overwrites with equal bytes).
// Tags are checked against blobs under the lock, so no tag can be written
// while the blob is aside. A crash while it is aside leaves a temporary
// file (a Scrub hint).
func (l *Local) removeBlobUnlessRecorded(dgst v1.Hash) (removed bool, err error) {
	if rec, err := l.recordedAnywhere(dgst); err != nil || rec {
		return false, err
	}
	p := l.blobPath(dgst)
	aside := filepath.Join(l.path(tmpDir), "removing-"+dgst.Hex)
	if err := os.Rename(p, aside); err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return false, nil
		}
		return false, fmt.Errorf("removing blob %s: %w", dgst, err)
	}
	rec, err := l.recordedAnywhere(dgst)
	if err == nil && !rec {
		if err := syncDir(filepath.Dir(p)); err != nil {
			return false, fmt.Errorf("removing blob %s: %w", dgst, err)
		}
		if err := os.Remove(aside); err != nil {
			return false, fmt.Errorf("removing blob %s: %w", dgst, err)
		}
		return true, nil
	}
	if rerr := os.Rename(aside, p); rerr != nil {
		return false, fmt.Errorf("removing blob %s: putting it back after a manifest recorded it: %w", dgst, rerr)
	}
	return false, err
}

// DeleteBlob removes blob dgst from blobs/sha256 (a missing one is fine).
// It refuses (ErrConflict) a blob that some repository records as a
// manifest: remove the manifest with DeleteManifest.
func (l *Local) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	unlock, err := l.lock(ctx)
	if err != nil {
		return err
	}
	defer unlock()
	removed, err := l.removeBlobUnlessRecorded(dgst)
	if err != nil {
		return err
	}
	if !removed {
		if _, serr := os.Lstat(l.blobPath(dgst)); serr == nil {
			return errkind.New(errkind.Conflict, "removing blob %s: it is a manifest a repository records; remove the manifest instead: %w", dgst, ErrConflict)
		}
	}
	return nil
}

// Blobs lists every blob of the directory that no repository records as
// a manifest, with its size and modification time. repo is only checked.
func (l *Local) Blobs(ctx context.Context, repo string) ([]BlobInfo, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	manifests := map[string]bool{}
	idx, err := l.readIndex()
	if err != nil {
		return nil, err
	}
	for _, d := range idx.Manifests {
		if d.Annotations[annotationRepository] != "" {
			manifests[d.Digest.Hex] = true
		}
	}
	repos, err := os.ReadDir(l.path(reposDir))
	if err != nil && !errors.Is(err, fs.ErrNotExist) {
		return nil, fmt.Errorf("listing repositories: %w", err)
	}
	for _, r := range repos {
		names, err := readDirNames(filepath.Join(l.path(reposDir), r.Name(), manifestsSub))
		if err != nil {
			return nil, err
		}
		for _, n := range names {
			manifests[n] = true
		}
	}
	names, err := readDirNames(l.path(blobsDir))
	if err != nil {
		return nil, err
	}
	out := make([]BlobInfo, 0, len(names))
	for _, n := range names {
		if !isDigestHex(n) || manifests[n] {
			continue
		}
		fi, err := os.Lstat(filepath.Join(l.path(blobsDir), n))
		if errors.Is(err, fs.ErrNotExist) {
			continue // removed since the listing
		}
		if err != nil {
			return nil, fmt.Errorf("listing blobs: %w", err)
		}
		if !fi.Mode().IsRegular() {
			continue // damage Scrub reports
		}
		out = append(out, BlobInfo{Digest: v1.Hash{Algorithm: "sha256", Hex: n}, Size: fi.Size(), Modified: fi.ModTime()})
	}
	return out, nil
}

// readDirNames lists a folder's names, sorted; a missing folder is empty.
func readDirNames(dir string) ([]string, error) {
	f, err := os.Open(dir)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("listing %s: %w", dir, err)
	}
	defer f.Close()
	names, err := f.Readdirnames(-1)
	if err != nil {
		return nil, fmt.Errorf("listing %s: %w", dir, err)
	}
	slices.Sort(names)
	return names, nil
}

// ManifestTimes returns when each manifest of repo was recorded: its side
// file's modification time (side files are written once), or for a
// manifest recorded only in index.json, its blob's.
func (l *Local) ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	out := map[v1.Hash]time.Time{}
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
		out[v1.Hash{Algorithm: "sha256", Hex: n}] = fi.ModTime()
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
			out[d.Digest] = fi.ModTime()
		}
	}
	return out, nil
}
