package release

import (
	"bytes"
	"context"
	"errors"
	"fmt"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// Artifact types of what this package stores.
var (
	ArtifactTypeApproval = artifact.ArtifactType("approval")
	ArtifactTypeRelease  = artifact.ArtifactType("release")
	// ArtifactTypeCommitted marks a release record whose tag move the
	// releasing process saw succeed (a referrer of the record).
	ArtifactTypeCommitted = artifact.ArtifactType("committed")
)

// Annotations on approval and release record manifests. They are hints
// for listings; decisions read the signed payload.
const (
	AnnotationTarget   = "dev.modelgate.target"
	AnnotationKind     = "dev.modelgate.release.kind"
	AnnotationPrevious = "dev.modelgate.release.previous"
	AnnotationFrom     = "dev.modelgate.release.from"
	AnnotationSigner   = "dev.modelgate.signer.keyid"
)

var emptyConfig = artifact.NewBlob(artifact.MediaTypeEmpty, []byte("{}"), nil)

// subjectOf returns the plain descriptor of a manifest in repo (for an
// artifact's subject field, or to tag it).
func subjectOf(ctx context.Context, store registry.Store, repo string, d v1.Hash) (v1.Descriptor, error) {
	_, desc, err := store.Manifest(ctx, repo, d)
	if err != nil {
		return v1.Descriptor{}, err
	}
	return v1.Descriptor{MediaType: desc.MediaType, Size: desc.Size, Digest: desc.Digest}, nil
}

// putArtifact uploads the empty config and the layers, then writes the
// manifest (not tagged). It costs one StatBlob and at most one PutBlob per
// blob, and one PutManifest, whatever the store holds.
func putArtifact(ctx context.Context, store registry.Store, repo, artifactType string, layers []artifact.Blob, subject v1.Descriptor, ann map[string]string) (v1.Descriptor, error) {
	for _, b := range append([]artifact.Blob{emptyConfig}, layers...) {
		if _, err := registry.ReuseBlob(ctx, store, repo, b.Desc.Digest); err == nil {
			continue
		}
		if b.Bytes == nil {
			return v1.Descriptor{}, errkind.New(errkind.Integrity, "blob %s is missing from the store", b.Desc.Digest)
		}
		if err := store.PutBlob(ctx, repo, b.Desc.Digest, b.Desc.Size, bytes.NewReader(b.Bytes)); err != nil {
			return v1.Descriptor{}, fmt.Errorf("uploading %s: %w", b.Desc.Digest, err)
		}
	}
	raw, err := artifact.BuildManifest(artifactType, emptyConfig, layers, &subject, ann)
	if err != nil {
		return v1.Descriptor{}, err
	}
	desc, err := store.PutManifest(ctx, repo, artifact.MediaTypeManifest, raw)
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("writing manifest: %w", err)
	}
	return desc, nil
}

// stored is a signed artifact read back: its manifest and its envelope.
type stored struct {
	Art      *artifact.Artifact
	Envelope *Envelope
}

// layer returns the descriptor of the artifact's only layer of media
// type mt.
func (s *stored) layer(mt types.MediaType) (v1.Descriptor, bool) {
	for _, l := range s.Art.Manifest.Layers {
		if l.MediaType == mt {
			return l, true
		}
	}
	return v1.Descriptor{}, false
}

// readSigned reads the artifact repo@d, which must be of artifactType
// want, and parses its envelope layer (other layers are not read).
// Unreadable or malformed content is errkind.Integrity: the store holds
// something modelgate did not write.
func readSigned(ctx context.Context, store registry.Store, repo string, d v1.Hash, want string) (*stored, error) {
	a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: d})
	if err != nil {
		if errors.Is(err, registry.ErrNotFound) && errkind.Of(err) != errkind.Integrity {
			return nil, errkind.New(errkind.Integrity, "%s@%s is missing from the store: %w", repo, d, err)
		}
		return nil, err
	}
	if a.Manifest.ArtifactType != want {
		return nil, errkind.New(errkind.Integrity, "%s@%s is a %q artifact, want %q", repo, d, a.Manifest.ArtifactType, want)
	}
	s := &stored{Art: a}
	seen := map[types.MediaType]bool{}
	for _, l := range a.Manifest.Layers {
		if seen[l.MediaType] {
			return nil, errkind.New(errkind.Integrity, "%s@%s has two %s layers", repo, d, l.MediaType)
		}
		seen[l.MediaType] = true
	}
	ld, ok := s.layer(MediaTypeEnvelope)
	if !ok {
		return nil, errkind.New(errkind.Integrity, "%s@%s has no DSSE envelope layer", repo, d)
	}
	raw, err := artifact.ReadBlob(ctx, store, repo, ld, maxEnvelopeBytes)
	if err != nil {
		return nil, fmt.Errorf("%s@%s: %w", repo, d, err)
	}
	env, err := ParseEnvelope(raw)
	if err != nil {
		return nil, errkind.New(errkind.Integrity, "%s@%s: %v", repo, d, err)
	}
	s.Envelope = env
	return s, nil
}

// shortHex is a digest's first 12 hex digits, for messages.
func shortHex(d string) string {
	if len(d) > 19 {
		return d[7:19]
	}
	return d
}
