// Package registry is modelgate's store: where artifacts live. One
// interface, Store, is implemented by every backend (a local directory in
// OCI image layout; later an OCI registry and a GCS bucket).
//
// Artifacts are OCI image manifests and their blobs. Every backend verifies
// a blob's digest and size on every upload and every read, and writes names
// last: blobs first, then the manifest, then the tag, so that a tag never
// points at missing content.
package registry

import (
	"context"
	"errors"
	"fmt"
	"io"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Errors that callers test with errors.Is. Backends wrap them with context
// and with an errkind so that the CLI exits with the documented code.
var (
	// ErrNotFound: no such repository, tag, manifest or blob.
	ErrNotFound = errors.New("not found")
	// ErrDigestMismatch: stored or uploaded bytes do not match their digest
	// or size (store damage when read, bad input when written).
	ErrDigestMismatch = errors.New("digest mismatch")
	// ErrConflict: a compare-and-swap lost (the tag moved).
	ErrConflict = errors.New("conflict")
	// ErrNoCatalog: the store cannot list its repositories (a registry
	// whose catalog endpoint is switched off or limited to admins, as many
	// hosted registries have it). Nothing is damaged: callers that only
	// search look where names and annotations point instead.
	ErrNoCatalog = errors.New("the registry does not list repositories")
)

// MaxManifestSize bounds manifests read or written: the OCI distribution
// spec only promises registries accept "at least 4 megabytes".
const MaxManifestSize = 4_000_000

// Store holds repositories of OCI manifests and blobs, and tags that name
// manifests. Repository names follow the OCI distribution-spec pattern (see
// ValidateRepository); tags follow ValidateTag.
//
// Contract for every implementation:
//   - All methods are safe for concurrent use, also by several processes
//     sharing the same backing store.
//   - PutBlob and PutManifest are idempotent: putting content that is
//     already present succeeds and writes nothing new.
//   - Every read verifies content against its digest: Blob returns a reader
//     whose Read fails with ErrDigestMismatch (before returning io.EOF) when
//     the bytes do not hash to the digest or differ in size; Manifest
//     returns ErrDigestMismatch instead of wrong bytes.
//   - A manifest may be put only after every blob it references (config,
//     layers) is present; its subject need not exist.
//   - Tag makes a tag point at a manifest already present; it is atomic
//     (readers see the old or the new target, never a torn state).
//   - Missing things give an error wrapping ErrNotFound.
type Store interface {
	// String names the store for messages (never includes credentials).
	String() string

	// Resolve returns the descriptor of the manifest that tag points at.
	Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error)
	// Manifest returns the verified bytes and descriptor of a manifest.
	Manifest(ctx context.Context, repo string, dgst v1.Hash) ([]byte, v1.Descriptor, error)
	// PutManifest stores a manifest (all its blobs must be present) and
	// returns its descriptor. It does not tag it.
	PutManifest(ctx context.Context, repo string, mediaType types.MediaType, raw []byte) (v1.Descriptor, error)

	// Blob opens a blob for reading; the reader verifies digest and size.
	Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error)
	// StatBlob returns a present blob's size.
	StatBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error)
	// PutBlob uploads a blob of the given digest and size from r. Bytes
	// that do not match fail with ErrDigestMismatch and leave nothing behind.
	PutBlob(ctx context.Context, repo string, dgst v1.Hash, size int64, r io.Reader) error

	// Tag points tag at a manifest already present in repo.
	Tag(ctx context.Context, repo, tag string, desc v1.Descriptor) error
	// Repositories lists the repositories, sorted. A store that cannot
	// list them returns an error wrapping ErrNoCatalog.
	Repositories(ctx context.Context) ([]string, error)
	// Tags lists repo's tags, sorted.
	Tags(ctx context.Context, repo string) ([]string, error)
	// Referrers lists the manifests in repo whose subject is subject,
	// filtered by artifactType unless it is empty.
	Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) ([]v1.Descriptor, error)
}

// TagSwapper is a Store that can move a tag by compare-and-swap.
type TagSwapper interface {
	// SwapTag points tag at desc only if it now points at old; a zero old
	// means the tag must not exist yet. A lost race fails with ErrConflict.
	SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error
}

// ManifestLister is a Store that can list every manifest it holds in a
// repository, tagged or not (used by whole-store verification).
type ManifestLister interface {
	// Manifests lists every manifest descriptor recorded in repo.
	Manifests(ctx context.Context, repo string) ([]v1.Descriptor, error)
}

// BlobStager is a Store that can take a blob before anyone knows its
// digest: the store hashes the bytes as it writes them, so content is read
// once, and the caller, having checked the same bytes on their way in
// (through an io.TeeReader, say), keeps or drops the result. Push uses it
// to stream a large tensor file into the store while validating it.
//
// Contract: nothing is visible to readers before Commit; Discard (or a
// crash) leaves no blob, at most a temporary file that Scrub reports.
// Stores without this ability take blobs through PutBlob, whose caller
// must know the digest first.
type BlobStager interface {
	// StageBlob reads exactly size bytes from r into temporary storage. It
	// fails with ErrDigestMismatch (errkind BadInput) when r holds fewer or
	// more bytes, and then leaves nothing behind.
	StageBlob(ctx context.Context, repo string, size int64, r io.Reader) (StagedBlob, error)
}

// StagedBlob is a blob written by StageBlob and not yet visible.
type StagedBlob interface {
	// Digest is the sha256 of the bytes the store wrote.
	Digest() v1.Hash
	// Size is their count.
	Size() int64
	// Commit makes the blob durable and visible under Digest. When a blob
	// of that digest is already present, the staged copy is dropped and
	// existed is true. Commit after Discard fails; a second Commit is a
	// no-op reporting the first one's existed.
	Commit(ctx context.Context) (existed bool, err error)
	// Discard drops the staged bytes; after Commit it does nothing.
	Discard() error
}

// StagedReader is a StagedBlob whose bytes can be read back before Commit
// (the local store's can): a caller that must look at the content in
// random order, as a Parquet reader does, reads the very bytes that will
// be committed instead of the source a second time.
type StagedReader interface {
	StagedBlob
	io.ReaderAt
}

// Deleter is a Store that can remove what it holds: the primitives a
// collector (and the untag command) builds on. Every method is safe for
// concurrent use, also by several processes, and crash-safe: a crash at
// any point leaves the store as before the call or as after it, or with
// at most a leftover that Scrub reports as a hint (never as damage), and
// calling the method again finishes the job.
//
// What no Deleter removes, whoever calls it (the guards live here, in the
// store, not in the caller):
//   - a tag that has a release log, or a release log's head pointer
//     (ErrGuarded, errkind.Unauthorized, for a guarded tag; errkind.BadInput
//     for the reserved names, see CheckTagName);
//   - a manifest that a tag of its repository still names (ErrConflict,
//     errkind.Conflict): tags go first, by DeleteTag;
//   - a release record or a marker of one (IsReleaseLogType: ErrGuarded,
//     errkind.Unauthorized): release logs are history and are never
//     collected.
type Deleter interface {
	// DeleteTag removes repo:tag if it points at want (a digest; zero is
	// refused). A tag pointing elsewhere wraps ErrConflict
	// (errkind.Conflict) and changes nothing; a missing tag wraps
	// ErrNotFound. Reserved tags and tags with a release log are refused
	// (CheckTagWrite's rules). The manifest stays in the repository.
	//
	// A store that cannot remove a tag on its own (an OCI registry without
	// the distribution-spec v1.1 tag DELETE) removes it by deleting its
	// manifest when no other tag names that manifest, and otherwise fails
	// with an error wrapping errors.ErrUnsupported (errkind.BadInput).
	DeleteTag(ctx context.Context, repo, tag string, want v1.Hash) error

	// DeleteManifest removes manifest dgst from repo, with the store's own
	// records of it (referrer links, bookkeeping tags, side files). It is
	// idempotent: a manifest that is not there is not an error. It
	// refuses, changing nothing, a manifest a tag of repo names
	// (ErrConflict) and a release record (ErrGuarded). The manifest's
	// referrers are not removed (their subject need not exist); remove
	// them first. On stores whose manifests are blobs (local), the
	// manifest's bytes go when no repository records the manifest any
	// more; config and layer blobs stay until DeleteBlob.
	DeleteManifest(ctx context.Context, repo string, dgst v1.Hash) error

	// DeleteBlob removes blob dgst. It is idempotent: a missing blob is not
	// an error. It does not check that no manifest references the blob:
	// that is the caller's mark, and Blobs' Modified times are the caller's
	// guard against a push in flight. When SharesBlobs, the blob is removed
	// for every repository of the store. A store that cannot remove blobs
	// returns an error wrapping errors.ErrUnsupported.
	DeleteBlob(ctx context.Context, repo string, dgst v1.Hash) error

	// Blobs lists the content blobs (configs, layers, and leftovers of
	// interrupted pushes; never a manifest some repository records) that
	// DeleteBlob can remove, sorted by digest. When SharesBlobs, the list
	// is the whole store's whatever repo is, and a blob is garbage only
	// when no manifest of any repository references it. A store that
	// cannot list blobs (an OCI registry: the distribution API has no such
	// call) returns an error wrapping errors.ErrUnsupported; its blob
	// space comes back only through the registry's own garbage collection.
	Blobs(ctx context.Context, repo string) ([]BlobInfo, error)

	// ManifestTimes returns, for every manifest recorded in repo, when the
	// store recorded it (first put into repo). An OCI registry keeps no
	// such time: there it is the newest of the manifest's push-time tags,
	// and a manifest without one is left out (its time is unknown, and a
	// collector keeps it). Never the manifest's created annotation: that is
	// when it was made, not when it came into the store.
	ManifestTimes(ctx context.Context, repo string) (map[v1.Hash]time.Time, error)

	// SharesBlobs reports whether blobs are one pool for every repository
	// of the store (local, GCS) rather than per repository.
	SharesBlobs() bool
}

// BlobInfo describes a stored blob.
type BlobInfo struct {
	Digest v1.Hash
	Size   int64
	// Modified is when the store last wrote the blob, or a writer last
	// reused it (on a Refresher: see there).
	Modified time.Time
	// Version changes whenever the blob is written or reused (on a
	// VersionedDeleter; "" elsewhere): DeleteBlobIf removes the blob only
	// while it is still this version.
	Version string
}

// ErrInUse: a conditional removal (DeleteBlobIf, DeleteManifestIf) found
// the item written again or reused by a writer since the collector looked
// at it, and left it. It is reported wrapped together with ErrConflict
// (errkind.Conflict).
var ErrInUse = errors.New("written or reused since it was judged")

// Stamp is what a store knows of an item's history: when it was written
// or last reused (its age), and a version that changes with every write
// or reuse.
type Stamp struct {
	Time    time.Time
	Version string
}

// Refresher is a store whose collector judges age by the store's own
// times and removes only what is still as it judged it (the local store,
// GCS). A writer that names content already present without writing it
// again refreshes it first: the refresh makes the item young and changes
// its version, so a collection that judged it old no longer removes it
// (DeleteBlobIf, DeleteManifestIf fail with ErrInUse); a refresh that
// comes after the removal fails with ErrNotFound, and the writer then
// writes the content again. That closes the window between a writer's
// "present, so not uploaded" and the removal of what it found present.
//
// PutBlob and PutManifest of content already present refresh it too, and
// PutManifest refreshes every blob it references (the check that they
// are present is a refresh), so no manifest is ever put naming a blob a
// collection is removing, whichever way its writer checked.
type Refresher interface {
	// RefreshBlob refreshes blob dgst and returns its size; ErrNotFound
	// when it is absent (or was just removed).
	RefreshBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error)
	// RefreshManifest refreshes manifest dgst of repo and returns its
	// descriptor; ErrNotFound when repo does not record it.
	RefreshManifest(ctx context.Context, repo string, dgst v1.Hash) (v1.Descriptor, error)
}

// VersionedDeleter is a Deleter that removes an item only while it is the
// version the caller saw: the collector's protection against a writer
// that reuses, after the mark, an item the mark judged old (see
// Refresher). Wrappers have these methods whatever they wrap; on a store
// without them they fail with errors.ErrUnsupported, and the caller uses
// the Deleter's own methods.
type VersionedDeleter interface {
	// ManifestStamps returns the stamp of every manifest recorded in repo
	// (ManifestTimes with versions; a reused manifest is young again).
	ManifestStamps(ctx context.Context, repo string) (map[v1.Hash]Stamp, error)
	// DeleteManifestIf is DeleteManifest of a manifest whose stamp still
	// has version; one written again or refreshed since stays, and the
	// error wraps ErrInUse. A manifest that is not there is not an error.
	DeleteManifestIf(ctx context.Context, repo string, dgst v1.Hash, version string) error
	// DeleteBlobIf is DeleteBlob of a blob still at version (its
	// BlobInfo's); one written again or refreshed since stays (ErrInUse).
	DeleteBlobIf(ctx context.Context, repo string, dgst v1.Hash, version string) error
}

// ReuseBlob is how a writer checks for a blob it is about to name without
// uploading it: on a Refresher it refreshes the blob (see there), on
// other stores it is StatBlob. ErrNotFound means: upload it.
func ReuseBlob(ctx context.Context, s Store, repo string, dgst v1.Hash) (int64, error) {
	if r, ok := Ability[Refresher](s); ok {
		return r.RefreshBlob(ctx, repo, dgst)
	}
	return s.StatBlob(ctx, repo, dgst)
}

// ReuseManifest is how a writer checks for a manifest it is about to
// reuse instead of putting it: on a Refresher it refreshes the manifest,
// on other stores it reads it. ErrNotFound means: put it.
func ReuseManifest(ctx context.Context, s Store, repo string, dgst v1.Hash) (v1.Descriptor, error) {
	if r, ok := Ability[Refresher](s); ok {
		return r.RefreshManifest(ctx, repo, dgst)
	}
	_, desc, err := s.Manifest(ctx, repo, dgst)
	return desc, err
}

// inUseError is the refusal of a conditional removal.
func inUseError(what string) error {
	return errkind.New(errkind.Conflict, "%s was written or reused since the collection judged it, and stays: %w (%w)", what, ErrInUse, ErrConflict)
}

// Artifact types of the release log (see internal/release): records and
// the markers that say how they ended. No Deleter removes them.
const (
	releaseRecordType    = "application/vnd.modelgate.release.v1"
	releaseCommittedType = "application/vnd.modelgate.committed.v1"
	releaseEndedType     = "application/vnd.modelgate.ended.v1"
)

// IsReleaseLogType reports whether artifactType is that of a release
// record or of a marker of one, which DeleteManifest refuses to remove.
func IsReleaseLogType(artifactType string) bool {
	switch artifactType {
	case releaseRecordType, releaseCommittedType, releaseEndedType:
		return true
	}
	return false
}

// checkDeleteTag applies DeleteTag's rules on the name and want.
func checkDeleteTag(repo, tag string, want v1.Hash) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := CheckTagName(tag); err != nil {
		return err
	}
	if err := checkDigest(want); err != nil {
		return errkind.New(errkind.BadInput, "removing tag %s:%s: the digest it must point at: %w", repo, tag, err)
	}
	return nil
}

// releaseLogError is DeleteManifest's refusal of a release record.
func releaseLogError(repo string, dgst v1.Hash, artifactType string) error {
	return errkind.New(errkind.Unauthorized, "%s@%s is part of a release log (%s): release records and their markers are never removed: %w", repo, dgst, artifactType, ErrGuarded)
}

// taggedError is DeleteManifest's refusal of a manifest tags still name.
func taggedError(repo string, dgst v1.Hash, tags []string) error {
	return errkind.New(errkind.Conflict, "%s@%s is still tagged (%s): remove its tags first: %w", repo, dgst, strings.Join(tags, ", "), ErrConflict)
}

// Finding is something a store-level check noticed.
type Finding struct {
	// Severity is "damage" (integrity lost) or "hint" (harmless, e.g. an
	// unreferenced blob left by a crash).
	Severity string `json:"severity"`
	// Where names the object: a blob digest, a repository:tag, a file.
	Where   string `json:"where"`
	Message string `json:"message"`
}

// Severities of a Finding.
const (
	SeverityDamage = "damage"
	SeverityHint   = "hint"
)

// Scrubber is a Store that can check its own storage below the level of
// manifests: every blob re-hashed, leftovers of interrupted writes, blobs
// no manifest references.
type Scrubber interface {
	// Scrub re-hashes every blob and reports findings. referenced is the set
	// of blob digests that some manifest references; blobs outside it are
	// reported as hints.
	Scrub(ctx context.Context, referenced map[v1.Hash]bool) ([]Finding, error)
}

// checkRefs is the rule every backend applies before it puts a manifest:
// every blob an image manifest references (config, layers) is present at
// the size the manifest gives, and every manifest an index lists is
// present. blobSize returns a blob's stored size, an error wrapping
// ErrNotFound when it is absent; hasManifest returns nil or such an error.
// What is missing is refused with ErrNotFound, a wrong size with
// ErrDigestMismatch, both errkind.BadInput.
func checkRefs(mt types.MediaType, mf manifestFields, blobSize func(v1.Hash) (int64, error), hasManifest func(v1.Hash) error) error {
	var missing, wrong []string
	if isImageManifest(mt) {
		for i, d := range append([]v1.Descriptor{*mf.Config}, mf.Layers...) {
			role := "config"
			if i > 0 {
				role = fmt.Sprintf("layer %d", i-1)
			}
			size, err := blobSize(d.Digest)
			switch {
			case errors.Is(err, ErrNotFound):
				missing = append(missing, fmt.Sprintf("%s %s", role, d.Digest))
			case err != nil:
				return err
			case size != d.Size:
				wrong = append(wrong, fmt.Sprintf("%s %s is %d bytes in the store, the manifest says %d", role, d.Digest, size, d.Size))
			}
		}
	} else {
		for i, d := range mf.Manifests {
			if err := checkDigest(d.Digest); err != nil {
				return err
			}
			if err := hasManifest(d.Digest); errors.Is(err, ErrNotFound) {
				missing = append(missing, fmt.Sprintf("manifest %d %s", i, d.Digest))
			} else if err != nil {
				return err
			}
		}
	}
	if len(missing) > 0 {
		return errkind.New(errkind.BadInput, "missing from the store: %s: %w", strings.Join(missing, ", "), ErrNotFound)
	}
	if len(wrong) > 0 {
		return errkind.New(errkind.BadInput, "%w: %s", ErrDigestMismatch, strings.Join(wrong, "; "))
	}
	return nil
}
