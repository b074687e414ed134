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
