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
// without its referrer file, side files moved aside into .modelgate/tmp,
// or an unrecorded blob: hints), and the next call finishes the job (an
// unrecorded manifest blob is then a blob that Blobs lists and DeleteBlob
// removes).
func (l *Local) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	return l.deleteManifest(ctx, repo, dgst, nil)
}

// DeleteManifestIf is DeleteManifest of a manifest whose side file still
// has version (ManifestStamps): see removeSide for why a writer that
// reuses it meanwhile keeps it.
func (l *Local) DeleteManifestIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	return l.deleteManifest(ctx, repo, dgst, &version)
}

func (l *Local) deleteManifest(ctx context.Context, repo string, dgst v1.Hash, version *string) error {
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
	if err := l.deleteManifestLocked(repo, dgst, version); err != nil {
		return fmt.Errorf("removing manifest %s from %s: %w", dgst, repo, err)
	}
	return nil
}

func (l *Local) deleteManifestLocked(repo string, dgst v1.Hash, version *string) error {
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
	side := l.manifestEntryPath(repo, dgst)
	if version != nil {
		// A manifest recorded only in index.json (an earlier store
		// version) has its blob's time for a stamp.
		p := side
		if _, err := os.Lstat(side); errors.Is(err, fs.ErrNotExist) {
			p = l.blobPath(dgst)
		}
		if fi, err := os.Lstat(p); err == nil && localVersion(fi) != *version {
			return inUseError(fmt.Sprintf("manifest %s of %s", dgst, repo))
		}
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
	var referrer string
	if s := entry.Annotations[annotationSubject]; s != "" {
		if subject, err := v1.NewHash(s); err == nil && checkDigest(subject) == nil {
			referrer = l.referrerEntryPath(repo, subject, entry.ArtifactType, dgst)
		}
	}
	recordedAt, err := l.removeSide(side, referrer, version)
	if err != nil {
		return err
	}
	// 4. The bytes, unless another repository records the manifest, or a
	// writer put the manifest again meanwhile: it refreshed the blob (or
	// wrote it anew) after the side file was last written or refreshed,
	// which the blob's time then shows.
	_, _, err = l.removeBlob(dgst, func(fi fs.FileInfo) bool {
		return !recordedAt.IsZero() && fi.ModTime().After(recordedAt)
	})
	return err
}

// removeSide removes a manifest's side files (referrer, when not "", and
// manifest), when version is not nil only while the manifest side file
// still has that version, and returns the manifest side file's time (zero
// when it had none). The caller holds the lock.
//
// Why a writer that reuses the manifest keeps it. Writers take no lock:
// one reusing the manifest refreshes its side file (RefreshManifest, or
// PutManifest finding it present), which sets the file's time to now and
// then checks, by its time, that the path still names the file it
// refreshed (refreshFile). Here both files are first moved aside into
// .modelgate/tmp, referrer first, then the manifest side file's version is
// read from the moved file, which no path reaches any more:
//   - a refresh that reached the file before the move changed its
//     version: both files go back (manifest first) and the removal is
//     refused (ErrInUse);
//   - a refresh that comes after the move finds nothing at the path (or
//     not its own time) and the writer puts the manifest again, writing
//     new side files; the ones moved aside are removed, or put back over
//     the new ones, with the same content;
//   - a refresh whose path lookup came before the move and whose time
//     change lands after the version was read here finds, after it, no
//     file with its time at the path: the same as the case before.
//
// So the removed file is one no writer refreshed, and a writer that was
// told "present" holds a file that stays. A crash while the files are
// aside leaves them in .modelgate/tmp (Scrub hints) and the manifest
// unrecorded, as after the removal; the version is also checked before
// the move, so only a refresh within that instant and a crash within the
// next can lose a reuse (its writer's tag then fails: Tag checks, under
// the lock, that the manifest is recorded).
func (l *Local) removeSide(side, referrer string, version *string) (time.Time, error) {
	var recordedAt time.Time
	var moved [][2]string // {path, aside}, in order of the moves
	putBack := func() error {
		for i := len(moved) - 1; i >= 0; i-- {
			if err := os.Rename(moved[i][1], moved[i][0]); err != nil {
				return fmt.Errorf("putting %s back: %w", l.relPath(moved[i][0]), err)
			}
		}
		return nil
	}
	removalStep(stepRemovalChecked)
	for i, p := range []string{referrer, side} {
		if p == "" {
			continue
		}
		aside := filepath.Join(l.path(tmpDir), []string{"removing-referrer-", "removing-manifest-"}[i]+filepath.Base(p))
		l.entries.drop(p)
		if err := os.Rename(p, aside); err != nil {
			if errors.Is(err, fs.ErrNotExist) {
				continue
			}
			perr := putBack()
			return recordedAt, errors.Join(fmt.Errorf("removing %s: %w", l.relPath(p), err), perr)
		}
		moved = append(moved, [2]string{p, aside})
		if p != side {
			continue
		}
		removalStep(stepRemovalMoved)
		fi, err := os.Lstat(aside)
		if err != nil {
			return recordedAt, errors.Join(fmt.Errorf("removing %s: %w", l.relPath(p), err), putBack())
		}
		recordedAt = fi.ModTime()
		if version != nil && localVersion(fi) != *version {
			if err := putBack(); err != nil {
				return recordedAt, err
			}
			return recordedAt, inUseError("manifest record " + l.relPath(p))
		}
	}
	for _, m := range moved {
		if err := syncDir(filepath.Dir(m[0])); err != nil {
			return recordedAt, fmt.Errorf("removing %s: %w", l.relPath(m[0]), err)
		}
		if err := os.Remove(m[1]); err != nil && !errors.Is(err, fs.ErrNotExist) {
			return recordedAt, fmt.Errorf("removing %s: %w", l.relPath(m[0]), err)
		}
	}
	return recordedAt, nil
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

// removeBlob removes blob dgst unless a repository records it as a
// manifest or stay says the file must stay; kept says it stayed for
// stay's reason. Callers hold the lock.
//
// Side files and blobs are written without the lock, and writers that
// reuse a blob refresh it without the lock too (refreshFile), so the blob
// is first moved aside into .modelgate/tmp, then judged: the records are
// checked, and stay reads the time of the file moved aside, which no path
// reaches any more. It is then removed, or moved back:
//   - a manifest put meanwhile that records it: moved back (a put that
//     found it missing wrote the same bytes again, which moving back
//     overwrites with equal bytes);
//   - a writer's refresh that reached the file before the move changed
//     its time: stay sees it, and it is moved back;
//   - a refresh after the move finds no file at the path (or one without
//     its own time): the writer writes the blob again, or, where it cannot
//     (PutManifest's check of the blobs a manifest names), looks again
//     under the lock, after this removal has finished either way, and
//     then finds the blob moved back or refuses the manifest as missing
//     one of its blobs. Either way no manifest names a removed blob.
//
// Tags are checked against blobs under the lock, so no tag can be written
// while the blob is aside. A crash while it is aside leaves a temporary
// file (a Scrub hint).
func (l *Local) removeBlob(dgst v1.Hash, stay func(fs.FileInfo) bool) (removed, kept bool, err error) {
	if rec, err := l.recordedAnywhere(dgst); err != nil || rec {
		return false, false, err
	}
	p := l.blobPath(dgst)
	if stay != nil {
		// Judged before the move too: a blob refreshed since the mark is
		// not moved at all.
		if fi, err := os.Lstat(p); err == nil && stay(fi) {
			return false, true, nil
		}
	}
	removalStep(stepRemovalChecked)
	aside := filepath.Join(l.path(tmpDir), "removing-"+dgst.Hex)
	if err := os.Rename(p, aside); err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return false, false, nil
		}
		return false, false, fmt.Errorf("removing blob %s: %w", dgst, err)
	}
	removalStep(stepRemovalMoved)
	rec, err := l.recordedAnywhere(dgst)
	if err == nil && !rec && stay != nil {
		fi, serr := os.Lstat(aside)
		if serr != nil {
			err = serr
		} else if stay(fi) {
			kept = true
		}
	}
	if err == nil && !rec && !kept {
		if err := syncDir(filepath.Dir(p)); err != nil {
			return false, false, fmt.Errorf("removing blob %s: %w", dgst, err)
		}
		if err := os.Remove(aside); err != nil {
			return false, false, fmt.Errorf("removing blob %s: %w", dgst, err)
		}
		return true, false, nil
	}
	if rerr := os.Rename(aside, p); rerr != nil {
		return false, false, fmt.Errorf("removing blob %s: putting it back after a writer used it: %w", dgst, rerr)
	}
	return false, kept, err
}

// DeleteBlob removes blob dgst from blobs/sha256 (a missing one is fine).
// It refuses (ErrConflict) a blob that some repository records as a
// manifest: remove the manifest with DeleteManifest.
func (l *Local) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	return l.deleteBlob(ctx, repo, dgst, nil)
}

// DeleteBlobIf is DeleteBlob of a blob still at version (its BlobInfo's):
// one a writer refreshed or wrote again since stays (ErrInUse); see
// removeBlob.
func (l *Local) DeleteBlobIf(ctx context.Context, repo string, dgst v1.Hash, version string) error {
	return l.deleteBlob(ctx, repo, dgst, &version)
}

func (l *Local) deleteBlob(ctx context.Context, repo string, dgst v1.Hash, version *string) error {
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
	var stay func(fs.FileInfo) bool
	if version != nil {
		stay = func(fi fs.FileInfo) bool { return localVersion(fi) != *version }
	}
	removed, kept, err := l.removeBlob(dgst, stay)
	if err != nil {
		return err
	}
	if kept {
		return inUseError("blob " + dgst.String())
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
		out = append(out, BlobInfo{Digest: v1.Hash{Algorithm: "sha256", Hex: n}, Size: fi.Size(), Modified: fi.ModTime(), Version: localVersion(fi)})
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
	stamps, err := l.ManifestStamps(ctx, repo)
	if err != nil {
		return nil, err
	}
	out := make(map[v1.Hash]time.Time, len(stamps))
	for d, s := range stamps {
		out[d] = s.Time
	}
	return out, nil
}
