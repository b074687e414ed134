package registry

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/remote/transport"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Deletion on a registry (distribution spec v1.1, "Content Management"):
//
//   - Manifests are deleted by digest (DELETE /v2/<name>/manifests/<digest>).
//     A registry may refuse all deletes (405, or the UNSUPPORTED code:
//     docker-registry unless storage.delete.enabled); the store then says
//     so (errkind.BadInput wrapping errors.ErrUnsupported), having changed
//     nothing. docker-registry removes every tag naming a manifest it
//     deletes; other registries keep tags under their own names, which the
//     store then deletes by name.
//   - Tags are deleted by name (DELETE /v2/<name>/manifests/<tag>) where
//     the registry has it (spec v1.1; the in-memory go-containerregistry
//     registry). docker-registry 2.8 does not (400 DIGEST_INVALID); there
//     a tag goes only with its manifest, so DeleteTag deletes the
//     manifest when no other tag names it and refuses otherwise.
//   - Blobs are never listed (the API has no such call): Blobs and
//     DeleteBlob return errors.ErrUnsupported, and blob space comes back
//     only through the registry's own garbage collection of blobs no
//     manifest references.
//   - The store's own bookkeeping tags of a deleted manifest (its keep tag,
//     its push-time tags, its per-referrer link tag, its entry in the
//     fallback referrers index of its subject) are removed after it,
//     unless a push put the manifest back meanwhile.
//   - No delete is conditional. The checks run right before the DELETE
//     (DeleteTag's two reads side by side; DeleteManifest's one tag
//     listing), and what a push racing a removal can and cannot lose is
//     argued in remote_pushtime.go.

var _ Deleter = (*Remote)(nil)

// SharesBlobs is false: a registry scopes blobs to repositories.
func (r *Remote) SharesBlobs() bool { return false }

// Blobs is unsupported: the distribution API cannot list blobs.
func (r *Remote) Blobs(ctx context.Context, repo string) ([]BlobInfo, error) {
	return nil, r.noBlobs()
}

// DeleteBlob is unsupported: see Blobs.
func (r *Remote) DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error {
	return r.noBlobs()
}

func (r *Remote) noBlobs() error {
	return errkind.New(errkind.BadInput, "%s: a registry does not list its blobs; their space comes back through the registry's own garbage collection once no manifest references them: %w", r, errors.ErrUnsupported)
}

// deleteStatus classifies a refused DELETE: unsupported is true when the
// registry does not do that kind of delete at all.
func deleteUnsupported(err error) bool {
	var te *transport.Error
	if !errors.As(err, &te) {
		return false
	}
	if te.StatusCode == http.StatusMethodNotAllowed {
		return true
	}
	for _, d := range te.Errors {
		if d.Code == transport.UnsupportedErrorCode {
			return true
		}
	}
	return false
}

// deleteManifestByDigest deletes a manifest by digest; a missing one is
// fine. A registry that refuses deletes gives errors.ErrUnsupported.
func (r *Remote) deleteManifestByDigest(ctx context.Context, full string, dgst v1.Hash) error {
	resp, err := r.call(ctx, full, http.MethodDelete, "/v2/"+full+"/manifests/"+dgst.String(), nil, nil, 0, http.StatusAccepted, http.StatusOK, http.StatusNoContent)
	switch {
	case err == nil:
		drain(resp)
		return nil
	case errors.Is(err, ErrNotFound):
		return nil
	case deleteUnsupported(err):
		return errkind.New(errkind.BadInput, "%s does not allow deleting manifests (switched off on the registry; docker-registry: storage.delete.enabled: true): %w", r.reg.RegistryStr(), errors.ErrUnsupported)
	}
	return err
}

// deleteTagByName deletes a tag by name (spec v1.1). ok is false when the
// registry does not delete tags by name (docker-registry 2.8 answers 400
// DIGEST_INVALID, others 405 or UNSUPPORTED).
func (r *Remote) deleteTagByName(ctx context.Context, full, tag string) (ok bool, err error) {
	resp, err := r.call(ctx, full, http.MethodDelete, "/v2/"+full+"/manifests/"+tag, nil, nil, 0, http.StatusAccepted, http.StatusOK, http.StatusNoContent)
	switch {
	case err == nil:
		drain(resp)
		return true, nil
	case errors.Is(err, ErrNotFound):
		return true, nil
	case deleteUnsupported(err):
		return false, nil
	}
	var te *transport.Error
	if errors.As(err, &te) && te.StatusCode == http.StatusBadRequest {
		return false, nil
	}
	return false, err
}

// DeleteTag removes repo:tag if it points at want: by name where the
// registry deletes tags; otherwise by deleting the manifest, when no other
// tag names it (see the comment at the top of this file). It refuses
// reserved tags and tags with a release log.
func (r *Remote) DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error {
	if err := checkDeleteTag(repo, tag, want); err != nil {
		return err
	}
	full := fullName(r.prefix, repo)
	if err := r.deleteTag(ctx, repo, full, tag, want); err != nil {
		return fmt.Errorf("removing tag %s:%s: %w", repo, tag, err)
	}
	return nil
}

func (r *Remote) deleteTag(ctx context.Context, repo, full, tag string, want v1.Hash) error {
	if r.tagDelete.Load() != tagDeleteNo {
		// The two checks (no release log, still at want) run at once,
		// right before the DELETE: the window in which another writer
		// can move the tag, or start its release log, and lose that to
		// the unconditional DELETE is one round trip.
		if err := r.checkTagAt(ctx, repo, full, tag, want); err != nil {
			return err
		}
		ok, err := r.deleteTagByName(ctx, full, tag)
		if err != nil {
			return err
		}
		if ok {
			r.tagDelete.Store(tagDeleteYes)
			return nil
		}
		r.tagDelete.Store(tagDeleteNo)
	}
	// A registry that deletes tags only with their manifest: the manifest
	// goes when no other tag names it. deleteManifest makes the same
	// checks with its last look at the tags, so a tag that moved away
	// in the meantime is not touched: the DELETE by digest removes only
	// tags that still name want.
	err := r.deleteManifest(ctx, repo, full, want, tag)
	var te *taggedErr
	if errors.As(err, &te) {
		return errkind.New(errkind.BadInput, "%s cannot delete a tag alone, only a manifest with every tag naming it, and %s is also tagged %s: %w", r.reg.RegistryStr(), want, strings.Join(te.tags, ", "), errors.ErrUnsupported)
	}
	return err
}

// Whether the registry deletes tags by name, learnt on the first try.
const (
	tagDeleteUnknown int32 = iota
	tagDeleteYes
	tagDeleteNo
)

// DeleteManifest deletes manifest dgst from repo, then its bookkeeping
// tags and its entry in its subject's fallback referrers index. It
// refuses a release record and a manifest a tag names: it lists repo's
// tags and resolves them (one HEAD each), except, under a Collection,
// those the collection's mark resolved; there it also refuses a manifest
// pushed or tagged again since the mark (ErrConflict).
func (r *Remote) DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error {
	if err := r.checkBlobArgs(repo, dgst); err != nil {
		return err
	}
	if err := r.deleteManifest(ctx, repo, fullName(r.prefix, repo), dgst, ""); err != nil {
		return fmt.Errorf("removing manifest %s from %s: %w", dgst, repo, err)
	}
	return nil
}

// deleteManifest is DeleteManifest, with tag (the one DeleteTag removes)
// allowed to name the manifest; it must still point at it, and have no
// release log, at the last look. The order, and what it guarantees
// against a push of the same bytes running beside it, is argued in
// remote_pushtime.go (C1 to C3).
func (r *Remote) deleteManifest(ctx context.Context, repo, full string, dgst v1.Hash, tag string) error {
	raw, _, err := r.getManifest(ctx, full, dgst.String())
	gone := errors.Is(err, ErrNotFound)
	if gone {
		// Deleted already; its bookkeeping tags may be left (an earlier
		// call stopped, or a registry that keeps tags of deleted
		// manifests): the keep tag still has the bytes.
		raw, _, err = r.getManifest(ctx, full, keepTag(dgst))
		if errors.Is(err, ErrNotFound) {
			if tag != "" {
				// The tag DeleteTag removes went with the manifest, or
				// points elsewhere now: say which.
				return r.checkTagAt(ctx, repo, full, tag, dgst)
			}
			return nil
		}
	}
	if err != nil {
		return err
	}
	var mf manifestFields
	if err := json.Unmarshal(raw, &mf); err != nil || sha256Of(raw) != dgst {
		if gone {
			return nil // the keep tag names other bytes: not ours to touch
		}
		return errkind.New(errkind.Integrity, "manifest %s: the registry's content does not parse or does not match its digest", dgst)
	}
	if at := mf.ArtifactType; IsReleaseLogType(at) {
		return releaseLogError(repo, dgst, at)
	}
	var stamps []string
	if gone {
		if tag != "" {
			// The tag DeleteTag removes went with the manifest, or
			// points elsewhere now: say which.
			if err := r.checkTagAt(ctx, repo, full, tag, dgst); err != nil {
				return err
			}
		}
		all, err := r.allTags(ctx, full)
		if err != nil && !errors.Is(err, ErrNotFound) {
			return err
		}
		stamps = stampsOf(all, dgst)
	} else {
		// C1: the last look, then C2: the DELETE.
		if stamps, err = r.lastLook(ctx, repo, full, dgst, tag); err != nil {
			return err
		}
		if err := r.deleteManifestByDigest(ctx, full, dgst); err != nil {
			return err
		}
		// C3: a push that put it back after the DELETE keeps it, with its
		// bookkeeping.
		if back, err := r.presentByDigest(ctx, full, dgst); err != nil {
			return err
		} else if back {
			return errkind.New(errkind.Conflict, "%s@%s was put back by a push while it was being removed: %w", repo, dgst, ErrConflict)
		}
		// On a registry that may keep the tags of a deleted manifest
		// (any but one known to delete tags only with their manifest), a
		// push-time tag written since the last look tells of a push
		// that ran entirely before the DELETE: put the manifest back.
		if r.tagDelete.Load() != tagDeleteNo {
			if err := r.putBackIfPushed(ctx, repo, full, dgst, raw, stamps); err != nil {
				return err
			}
		}
	}
	// Bookkeeping: tags the registry kept, then the fallback index entry.
	names := append([]string{keepTag(dgst)}, stamps...)
	if tag != "" {
		names = append(names, tag)
	}
	if mf.Subject != nil && checkDigest(mf.Subject.Digest) == nil {
		names = append(names, linkTag(mf.Subject.Digest, dgst))
	}
	for _, t := range names {
		if err := r.dropTag(ctx, full, t, dgst); err != nil {
			return err
		}
	}
	if mf.Subject != nil && checkDigest(mf.Subject.Digest) == nil {
		return r.dropFromFallbackIndex(ctx, full, mf.Subject.Digest, dgst)
	}
	return nil
}

// sha256Of is the sha256 digest of b.
func sha256Of(b []byte) v1.Hash {
	sum := sha256.Sum256(b)
	return v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(sum[:])}
}

// dropTag removes tag when it still points at dgst.
func (r *Remote) dropTag(ctx context.Context, full, tag string, dgst v1.Hash) error {
	d, err := r.head(ctx, full, tag)
	if errors.Is(err, ErrNotFound) {
		return nil
	}
	if err != nil {
		return err
	}
	if d.Digest != dgst {
		return nil
	}
	// A push that put the manifest back meanwhile keeps its tags.
	if back, err := r.presentByDigest(ctx, full, dgst); err != nil || back {
		return err
	}
	ok, err := r.deleteTagByName(ctx, full, tag)
	if err != nil {
		return err
	}
	if !ok {
		return errkind.New(errkind.Integrity, "%s kept tag %s of deleted manifest %s and does not delete tags by name", r.reg.RegistryStr(), tag, dgst)
	}
	return nil
}

// dropFromFallbackIndex removes ref from subject's fallback referrers
// index (read, modify, write, as the spec's fallback does), deleting the
// index when ref was its last entry.
func (r *Remote) dropFromFallbackIndex(ctx context.Context, full string, subject, ref v1.Hash) error {
	raw, _, err := r.getManifest(ctx, full, fallbackTag(subject))
	if errors.Is(err, ErrNotFound) {
		return nil
	}
	if err != nil {
		return err
	}
	var idx v1.IndexManifest
	if err := json.Unmarshal(raw, &idx); err != nil || idx.SchemaVersion != 2 {
		return errkind.New(errkind.Integrity, "fallback referrers index %s is not an OCI image index", fallbackTag(subject))
	}
	kept := idx.Manifests[:0]
	for _, d := range idx.Manifests {
		if d.Digest != ref {
			kept = append(kept, d)
		}
	}
	if len(kept) == len(idx.Manifests) {
		return nil
	}
	if len(kept) == 0 {
		old := sha256Of(raw)
		if err := r.deleteManifestByDigest(ctx, full, old); err != nil {
			return err
		}
		return r.dropTag(ctx, full, fallbackTag(subject), old)
	}
	idx.Manifests = kept
	b, err := json.Marshal(idx)
	if err != nil {
		return err
	}
	_, err = r.putManifest(ctx, full, fallbackTag(subject), types.OCIImageIndex, b)
	return err
}
