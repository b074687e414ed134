// Package storetest is the conformance suite every registry.Store backend
// runs: one set of tests, so that the local layout, an OCI registry and a
// GCS bucket behave the same way for their callers.
package storetest

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"slices"
	"strings"
	"sync"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// Media types the suite's artifacts use (the project's own, see
// internal/artifact; repeated here so the suite depends on nothing but the
// store interface).
const (
	specType     types.MediaType = "application/vnd.modelgate.spec.v1+json"
	tensorsType  types.MediaType = "application/vnd.modelgate.tensors.v1.safetensors"
	encoderType                  = "application/vnd.modelgate.encoder.v1"
	reportType                   = "application/vnd.modelgate.report.v1"
	approvalType                 = "application/vnd.modelgate.approval.v1"
)

// Run runs the conformance suite. open must return a new, empty store for
// each call (each subtest calls it once). Optional abilities (TagSwapper,
// ManifestLister, BlobStager, Deleter) are tested when the store has them.
//
// Behaviour the suite pins down beyond the Store doc comment: Tags of a
// repository never written to returns no tags or an error wrapping
// ErrNotFound; a refused manifest's error names the missing digest;
// invalid repository names, tags and digests are refused with
// errkind.BadInput before any I/O; Referrers descriptors carry the
// referrer's artifactType and annotations.
func Run(t *testing.T, open func(t *testing.T) registry.Store) {
	run(t, open, false)
}

// RunWithoutCatalog runs the suite against a store that cannot list its
// repositories (a registry whose catalog endpoint is switched off):
// Repositories must fail with an error wrapping registry.ErrNoCatalog, and
// everything else must behave as in Run.
func RunWithoutCatalog(t *testing.T, open func(t *testing.T) registry.Store) {
	run(t, open, true)
}

func run(t *testing.T, open func(t *testing.T) registry.Store, noCatalog bool) {
	t.Run("BlobRoundTrip", func(t *testing.T) { testBlobRoundTrip(t, open(t)) })
	t.Run("BlobIdempotent", func(t *testing.T) { testBlobIdempotent(t, open(t)) })
	t.Run("BlobMismatchRefused", func(t *testing.T) { testBlobMismatch(t, open(t)) })
	t.Run("BlobNotFound", func(t *testing.T) { testBlobNotFound(t, open(t)) })
	t.Run("ManifestRoundTrip", func(t *testing.T) { testManifestRoundTrip(t, open(t)) })
	t.Run("ManifestMissingBlobRefused", func(t *testing.T) { testManifestMissingBlob(t, open(t)) })
	t.Run("ManifestBadInputRefused", func(t *testing.T) { testManifestBadInput(t, open(t)) })
	t.Run("TagResolveRetag", func(t *testing.T) { testTagResolve(t, open(t)) })
	t.Run("ListingsSorted", func(t *testing.T) { testListings(t, open(t), noCatalog) })
	t.Run("FindManifest", func(t *testing.T) { testFindManifest(t, open(t), noCatalog) })
	t.Run("Referrers", func(t *testing.T) { testReferrers(t, open(t)) })
	t.Run("TaggedReferrersListedOnce", func(t *testing.T) { testTaggedReferrers(t, open(t)) })
	t.Run("SwapTag", func(t *testing.T) { testSwapTag(t, open(t)) })
	t.Run("GuardedTags", func(t *testing.T) { testGuardedTags(t, open(t)) })
	t.Run("Manifests", func(t *testing.T) { testManifests(t, open(t)) })
	t.Run("InvalidNamesRefused", func(t *testing.T) { testInvalidNames(t, open(t)) })
	t.Run("ConcurrentWriters", func(t *testing.T) { testConcurrent(t, open(t)) })
	t.Run("StagedBlobs", func(t *testing.T) { testStaged(t, open(t)) })
	t.Run("DeleteTag", func(t *testing.T) { testDeleteTag(t, open(t)) })
	t.Run("DeleteGuarded", func(t *testing.T) { testDeleteGuarded(t, open(t)) })
	t.Run("DeleteManifest", func(t *testing.T) { testDeleteManifest(t, open(t)) })
	t.Run("DeleteBlob", func(t *testing.T) { testDeleteBlob(t, open(t)) })
}

// Blob is content with its digest.
type Blob struct {
	Data   []byte
	Digest v1.Hash
}

// NewBlob returns n pseudo-random bytes from seed and their digest.
func NewBlob(seed uint64, n int) Blob {
	r := rand.New(rand.NewPCG(seed, 0x6d6f64656c67))
	b := make([]byte, n)
	for i := range b {
		b[i] = byte(r.Uint32())
	}
	return BlobOf(b)
}

// BlobOf returns b with its digest.
func BlobOf(b []byte) Blob {
	sum := sha256.Sum256(b)
	return Blob{Data: b, Digest: v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(sum[:])}}
}

func (b Blob) desc(mt types.MediaType) v1.Descriptor {
	return v1.Descriptor{MediaType: mt, Size: int64(len(b.Data)), Digest: b.Digest}
}

// Artifact is a manifest and the blobs it references.
type Artifact struct {
	Config   Blob
	Layers   []Blob
	Manifest Blob
}

// NewArtifact builds an OCI image manifest (image-spec v1.1 artifact form)
// with a spec config and tensors layers made from seed, the given
// artifactType and annotations, and a subject when subject is non-nil.
func NewArtifact(seed uint64, artifactType string, subject *v1.Descriptor, annotations map[string]string) Artifact {
	cfg := BlobOf(fmt.Appendf(nil, `{"name":"listener-encoder","seed":%d}`, seed))
	layers := []Blob{NewBlob(seed*2+1, 300+int(seed%97)), NewBlob(seed*2+2, 100)}
	m := v1.Manifest{
		SchemaVersion: 2,
		MediaType:     types.OCIManifestSchema1,
		ArtifactType:  artifactType,
		Config:        cfg.desc(specType),
		Annotations:   annotations,
		Subject:       subject,
	}
	for _, l := range layers {
		m.Layers = append(m.Layers, l.desc(tensorsType))
	}
	raw, err := json.Marshal(m)
	if err != nil {
		panic(err) // a v1.Manifest always encodes
	}
	return Artifact{Config: cfg, Layers: layers, Manifest: BlobOf(raw)}
}

// Descriptor is the artifact manifest's descriptor.
func (a Artifact) Descriptor() v1.Descriptor { return a.Manifest.desc(types.OCIManifestSchema1) }

// PushBlobs puts the artifact's config and layers into repo.
func PushBlobs(t testing.TB, s registry.Store, repo string, a Artifact) {
	t.Helper()
	for _, b := range append([]Blob{a.Config}, a.Layers...) {
		if err := s.PutBlob(context.Background(), repo, b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); err != nil {
			t.Fatalf("PutBlob %s: %v", b.Digest, err)
		}
	}
}

// Push puts the artifact's blobs and manifest into repo and, when tag is
// not empty, tags it.
func Push(t testing.TB, s registry.Store, repo, tag string, a Artifact) v1.Descriptor {
	t.Helper()
	ctx := context.Background()
	PushBlobs(t, s, repo, a)
	desc, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data)
	if err != nil {
		t.Fatalf("PutManifest: %v", err)
	}
	if tag != "" {
		if err := s.Tag(ctx, repo, tag, desc); err != nil {
			t.Fatalf("Tag %s:%s: %v", repo, tag, err)
		}
	}
	return desc
}

func readBlob(t testing.TB, s registry.Store, repo string, d v1.Hash) []byte {
	t.Helper()
	rc, err := s.Blob(context.Background(), repo, d)
	if err != nil {
		t.Fatalf("Blob %s: %v", d, err)
	}
	defer rc.Close()
	b, err := io.ReadAll(rc)
	if err != nil {
		t.Fatalf("reading blob %s: %v", d, err)
	}
	return b
}

func wantNotFound(t *testing.T, what string, err error) {
	t.Helper()
	if !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("%s: got error %v, want one wrapping ErrNotFound", what, err)
	}
}

func testBlobRoundTrip(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	for _, n := range []int{0, 1, 4096, 3<<20 + 17} {
		b := NewBlob(uint64(n), n)
		if err := s.PutBlob(ctx, repo, b.Digest, int64(n), bytes.NewReader(b.Data)); err != nil {
			t.Fatalf("PutBlob(%d bytes): %v", n, err)
		}
		size, err := s.StatBlob(ctx, repo, b.Digest)
		if err != nil || size != int64(n) {
			t.Errorf("StatBlob = %d, %v; want %d, nil", size, err, n)
		}
		if got := readBlob(t, s, repo, b.Digest); !bytes.Equal(got, b.Data) {
			t.Errorf("Blob(%d bytes) returned %d different bytes", n, len(got))
		}
		// Small reads take the plain Read path (no WriteTo).
		rc, err := s.Blob(ctx, repo, b.Digest)
		if err != nil {
			t.Fatal(err)
		}
		var got []byte
		buf := make([]byte, 1000)
		for {
			k, err := rc.Read(buf)
			got = append(got, buf[:k]...)
			if err == io.EOF {
				break
			}
			if err != nil {
				t.Fatalf("Read: %v", err)
			}
		}
		rc.Close()
		if !bytes.Equal(got, b.Data) {
			t.Errorf("Blob(%d bytes) by small reads returned %d different bytes", n, len(got))
		}
	}
}

func testBlobIdempotent(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/shows"
	b := NewBlob(7, 10000)
	for i := range 3 {
		if err := s.PutBlob(ctx, repo, b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); err != nil {
			t.Fatalf("PutBlob #%d: %v", i+1, err)
		}
	}
	if got := readBlob(t, s, repo, b.Digest); !bytes.Equal(got, b.Data) {
		t.Error("blob changed after repeated puts")
	}
}

func testBlobMismatch(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/shows"
	good := NewBlob(11, 5000)
	other := NewBlob(12, 5000)
	cases := []struct {
		name string
		dgst v1.Hash
		size int64
		data []byte
	}{
		{"wrong digest", good.Digest, 5000, other.Data},
		{"declared size too small", good.Digest, 4999, good.Data},
		{"declared size too large", good.Digest, 5001, good.Data},
		{"short body", good.Digest, 5000, good.Data[:4000]},
	}
	for _, c := range cases {
		t.Run(strings.ReplaceAll(c.name, " ", "_"), func(t *testing.T) {
			err := s.PutBlob(ctx, repo, c.dgst, c.size, bytes.NewReader(c.data))
			if !errors.Is(err, registry.ErrDigestMismatch) {
				t.Fatalf("PutBlob: got %v, want ErrDigestMismatch", err)
			}
			if k := errkind.Of(err); k != errkind.BadInput {
				t.Errorf("PutBlob error kind = %v, want bad input (it is an upload)", k)
			}
			_, err = s.StatBlob(ctx, repo, c.dgst)
			wantNotFound(t, "StatBlob after refused put", err)
			_, err = s.Blob(ctx, repo, c.dgst)
			wantNotFound(t, "Blob after refused put", err)
		})
	}
}

func testBlobNotFound(t *testing.T, s registry.Store) {
	ctx := context.Background()
	d := NewBlob(99, 10).Digest
	_, err := s.StatBlob(ctx, "podcast/shows", d)
	wantNotFound(t, "StatBlob", err)
	_, err = s.Blob(ctx, "podcast/shows", d)
	wantNotFound(t, "Blob", err)
}

func testManifestRoundTrip(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	a := NewArtifact(1, encoderType, nil, map[string]string{"org.opencontainers.image.source": "https://example.com/podcast-models"})
	PushBlobs(t, s, repo, a)
	desc, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data)
	if err != nil {
		t.Fatalf("PutManifest: %v", err)
	}
	if desc.Digest != a.Manifest.Digest || desc.Size != int64(len(a.Manifest.Data)) || desc.MediaType != types.OCIManifestSchema1 {
		t.Errorf("PutManifest descriptor = %+v, want digest %s size %d", desc, a.Manifest.Digest, len(a.Manifest.Data))
	}
	again, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data)
	if err != nil || again.Digest != desc.Digest {
		t.Errorf("second PutManifest = %v, %v; want same digest", again.Digest, err)
	}
	raw, got, err := s.Manifest(ctx, repo, a.Manifest.Digest)
	if err != nil {
		t.Fatalf("Manifest: %v", err)
	}
	if !bytes.Equal(raw, a.Manifest.Data) {
		t.Error("Manifest returned different bytes")
	}
	if got.Digest != desc.Digest || got.Size != desc.Size || got.MediaType != desc.MediaType {
		t.Errorf("Manifest descriptor = %+v, want %+v", got, desc)
	}
	for _, b := range append([]Blob{a.Config}, a.Layers...) {
		if !bytes.Equal(readBlob(t, s, repo, b.Digest), b.Data) {
			t.Errorf("blob %s differs", b.Digest)
		}
	}
	_, _, err = s.Manifest(ctx, repo, NewBlob(5, 5).Digest)
	wantNotFound(t, "Manifest of unknown digest", err)
}

func testManifestMissingBlob(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/promo-scorer"
	a := NewArtifact(2, encoderType, nil, nil)
	// Config and first layer only: the second layer is missing.
	for _, b := range []Blob{a.Config, a.Layers[0]} {
		if err := s.PutBlob(ctx, repo, b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); err != nil {
			t.Fatal(err)
		}
	}
	_, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data)
	if err == nil {
		t.Fatal("PutManifest with a missing layer succeeded")
	}
	if !strings.Contains(err.Error(), a.Layers[1].Digest.Hex) {
		t.Errorf("error %q does not name the missing digest %s", err, a.Layers[1].Digest)
	}
	_, _, err = s.Manifest(ctx, repo, a.Manifest.Digest)
	wantNotFound(t, "Manifest after refused put", err)
	// Once the blob is there the same manifest is accepted.
	if err := s.PutBlob(ctx, repo, a.Layers[1].Digest, int64(len(a.Layers[1].Data)), bytes.NewReader(a.Layers[1].Data)); err != nil {
		t.Fatal(err)
	}
	if _, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data); err != nil {
		t.Errorf("PutManifest after the blob arrived: %v", err)
	}
}

func testManifestBadInput(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/promo-scorer"
	a := NewArtifact(3, encoderType, nil, nil)
	PushBlobs(t, s, repo, a)
	big := NewArtifact(3, encoderType, nil, map[string]string{"dev.modelgate.padding": strings.Repeat("x", registry.MaxManifestSize)})
	cases := map[string][]byte{
		"not JSON":             []byte("listener-encoder v1"),
		"truncated JSON":       a.Manifest.Data[:len(a.Manifest.Data)-1],
		"over the size limit":  big.Manifest.Data,
		"wrong schema version": bytes.Replace(a.Manifest.Data, []byte(`"schemaVersion":2`), []byte(`"schemaVersion":1`), 1),
	}
	for name, raw := range cases {
		if _, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, raw); err == nil {
			t.Errorf("PutManifest of %s succeeded", name)
		} else if k := errkind.Of(err); k != errkind.BadInput {
			t.Errorf("PutManifest of %s: error kind %v, want bad input (%v)", name, k, err)
		}
	}
}

func testTagResolve(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	a1 := NewArtifact(21, encoderType, nil, nil)
	a2 := NewArtifact(22, encoderType, nil, nil)
	d1 := Push(t, s, repo, "prod", a1)
	d2 := Push(t, s, repo, "", a2)

	got, err := s.Resolve(ctx, repo, "prod")
	if err != nil || got.Digest != d1.Digest || got.Size != d1.Size || got.MediaType != d1.MediaType {
		t.Fatalf("Resolve(prod) = %+v, %v; want %s", got, err, d1.Digest)
	}
	if err := s.Tag(ctx, repo, "prod", d2); err != nil {
		t.Fatalf("retag: %v", err)
	}
	if got, err := s.Resolve(ctx, repo, "prod"); err != nil || got.Digest != d2.Digest {
		t.Errorf("Resolve(prod) after retag = %v, %v; want %s", got.Digest, err, d2.Digest)
	}
	// Tagging the same target again is a no-op.
	if err := s.Tag(ctx, repo, "prod", d2); err != nil {
		t.Errorf("tagging again: %v", err)
	}
	// The old manifest is still there, untagged.
	if _, _, err := s.Manifest(ctx, repo, d1.Digest); err != nil {
		t.Errorf("Manifest of the untagged manifest: %v", err)
	}
	_, err = s.Resolve(ctx, repo, "canary")
	wantNotFound(t, "Resolve of a missing tag", err)
	_, err = s.Resolve(ctx, "podcast/nothing-here", "prod")
	wantNotFound(t, "Resolve in a missing repository", err)

	missing := NewArtifact(23, encoderType, nil, nil).Descriptor()
	err = s.Tag(ctx, repo, "canary", missing)
	wantNotFound(t, "Tag of a manifest not in the store", err)
	_, err = s.Resolve(ctx, repo, "canary")
	wantNotFound(t, "Resolve after a refused Tag", err)

	// A manifest of another repository cannot be tagged here.
	Push(t, s, "podcast/other", "", NewArtifact(24, encoderType, nil, nil))
	err = s.Tag(ctx, repo, "canary", NewArtifact(24, encoderType, nil, nil).Descriptor())
	wantNotFound(t, "Tag of another repository's manifest", err)
}

func testListings(t *testing.T, s registry.Store, noCatalog bool) {
	ctx := context.Background()
	repos := []string{"podcast/shows", "alpha", "podcast/episodes-played", "podcast/listener-encoder"}
	tags := []string{"prod", "Canary", "v10", "v2", "_rc", "a.b-c"}
	for i, r := range repos {
		a := NewArtifact(uint64(30+i), encoderType, nil, nil)
		for _, tg := range tags {
			Push(t, s, r, tg, a)
		}
	}
	// One repository with a manifest but no tag.
	Push(t, s, "zeta/untagged", "", NewArtifact(40, encoderType, nil, nil))

	got, err := s.Repositories(ctx)
	if noCatalog {
		if !errors.Is(err, registry.ErrNoCatalog) || errkind.Of(err) == errkind.Integrity {
			t.Errorf("Repositories without a catalog = %q, %v; want an error wrapping ErrNoCatalog, not integrity", got, err)
		}
	} else {
		if err != nil {
			t.Fatal(err)
		}
		want := append(slices.Clone(repos), "zeta/untagged")
		slices.Sort(want)
		if !slices.Equal(got, want) {
			t.Errorf("Repositories = %q, want %q", got, want)
		}
	}
	wantTags := slices.Clone(tags)
	slices.Sort(wantTags) // byte order: "Canary" < "_rc" < "a.b-c" < "prod" < "v10" < "v2"
	for _, r := range repos {
		got, err := s.Tags(ctx, r)
		if err != nil || !slices.Equal(got, wantTags) {
			t.Errorf("Tags(%s) = %q, %v; want %q", r, got, err, wantTags)
		}
	}
	if got, err := s.Tags(ctx, "zeta/untagged"); err != nil || len(got) != 0 {
		t.Errorf("Tags of an untagged repository = %q, %v; want none", got, err)
	}
	if got, err := s.Tags(ctx, "never/written"); len(got) != 0 || (err != nil && !errors.Is(err, registry.ErrNotFound)) {
		t.Errorf("Tags of an unknown repository = %q, %v; want none or ErrNotFound", got, err)
	}
}

// testFindManifest: a manifest is found in the repository named first
// without a listing (so on stores without a catalog too); elsewhere only by
// listing, and a store that cannot list says so rather than "not found".
func testFindManifest(t *testing.T, s registry.Store, noCatalog bool) {
	ctx := context.Background()
	a := NewArtifact(50, encoderType, nil, nil)
	d := Push(t, s, "podcast/listener-encoder", "v1", a)
	Push(t, s, "podcast/shows", "v1", NewArtifact(51, encoderType, nil, nil))
	got, err := registry.FindManifest(ctx, s, d.Digest, "podcast/shows", "podcast/listener-encoder")
	if err != nil || got != "podcast/listener-encoder" {
		t.Errorf("FindManifest with the repository named = %q, %v; want podcast/listener-encoder", got, err)
	}
	got, err = registry.FindManifest(ctx, s, d.Digest, "podcast/shows")
	switch {
	case noCatalog && !errors.Is(err, registry.ErrNoCatalog):
		t.Errorf("FindManifest elsewhere without a catalog = %q, %v; want ErrNoCatalog", got, err)
	case !noCatalog && (err != nil || got != "podcast/listener-encoder"):
		t.Errorf("FindManifest by listing = %q, %v; want podcast/listener-encoder", got, err)
	}
	missing := NewArtifact(52, encoderType, nil, nil).Descriptor().Digest
	_, err = registry.FindManifest(ctx, s, missing, "podcast/listener-encoder")
	want := registry.ErrNotFound
	if noCatalog {
		want = registry.ErrNoCatalog
	}
	if !errors.Is(err, want) || errkind.Of(err) == errkind.Integrity {
		t.Errorf("FindManifest of a digest nowhere: %v; want %v, not integrity", err, want)
	}
}

func descDigests(ds []v1.Descriptor) []string {
	var out []string
	for _, d := range ds {
		out = append(out, d.Digest.String())
	}
	slices.Sort(out)
	return out
}

func testReferrers(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/promo-scorer"
	model := NewArtifact(50, encoderType, nil, nil)
	other := NewArtifact(51, encoderType, nil, nil)
	md := Push(t, s, repo, "candidate", model)
	od := Push(t, s, repo, "", other)

	subj := md
	subj.ArtifactType = ""
	report := NewArtifact(52, reportType, &subj, map[string]string{"org.opencontainers.image.created": "2026-01-02T03:04:05Z"})
	approval := NewArtifact(53, approvalType, &subj, nil)
	otherSubj := od
	otherSubj.ArtifactType = ""
	elsewhere := NewArtifact(54, reportType, &otherSubj, nil)
	for _, a := range []Artifact{report, approval, elsewhere} {
		Push(t, s, repo, "", a)
	}

	all, err := s.Referrers(ctx, repo, md.Digest, "")
	if err != nil {
		t.Fatal(err)
	}
	want := descDigests([]v1.Descriptor{report.Descriptor(), approval.Descriptor()})
	if got := descDigests(all); !slices.Equal(got, want) {
		t.Errorf("Referrers(all) = %q, want %q", got, want)
	}
	for _, d := range all {
		switch d.Digest {
		case report.Manifest.Digest:
			if d.ArtifactType != reportType || d.Size != int64(len(report.Manifest.Data)) {
				t.Errorf("report referrer descriptor = %+v", d)
			}
			// Distribution spec v1.1, "Listing Referrers": descriptors
			// include the referrer's annotations.
			if d.Annotations["org.opencontainers.image.created"] != "2026-01-02T03:04:05Z" {
				t.Errorf("report referrer lacks its annotations: %v", d.Annotations)
			}
		case approval.Manifest.Digest:
			if d.ArtifactType != approvalType {
				t.Errorf("approval referrer artifactType = %q", d.ArtifactType)
			}
		}
	}
	reports, err := s.Referrers(ctx, repo, md.Digest, reportType)
	if err != nil {
		t.Fatal(err)
	}
	if got := descDigests(reports); !slices.Equal(got, []string{report.Manifest.Digest.String()}) {
		t.Errorf("Referrers(report) = %q, want only %s", got, report.Manifest.Digest)
	}
	none, err := s.Referrers(ctx, repo, md.Digest, "application/vnd.modelgate.release.v1")
	if err != nil || len(none) != 0 {
		t.Errorf("Referrers(release) = %v, %v; want none", none, err)
	}
	// A subject with no referrers (or not in the store) lists nothing.
	none, err = s.Referrers(ctx, repo, NewBlob(55, 1).Digest, "")
	if err != nil || len(none) != 0 {
		t.Errorf("Referrers(unknown subject) = %v, %v; want none", none, err)
	}
}

// testTaggedReferrers: a referrer that is also tagged (under two tags),
// and one put twice, are listed once by Referrers and Manifests.
func testTaggedReferrers(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	md := Push(t, s, repo, "prod", NewArtifact(56, encoderType, nil, nil))
	subj := md
	subj.ArtifactType = ""
	report := NewArtifact(57, reportType, &subj, nil)
	approval := NewArtifact(58, approvalType, &subj, nil)
	rd := Push(t, s, repo, "report-latest", report)
	if err := s.Tag(ctx, repo, "report-v1", rd); err != nil {
		t.Fatal(err)
	}
	Push(t, s, repo, "", approval)
	Push(t, s, repo, "", approval)

	all, err := s.Referrers(ctx, repo, md.Digest, "")
	want := descDigests([]v1.Descriptor{report.Descriptor(), approval.Descriptor()})
	if got := descDigests(all); err != nil || !slices.Equal(got, want) {
		t.Errorf("Referrers = %q, %v; want %q", got, err, want)
	}
	reports, err := s.Referrers(ctx, repo, md.Digest, reportType)
	if got := descDigests(reports); err != nil || !slices.Equal(got, []string{rd.Digest.String()}) {
		t.Errorf("Referrers(report) = %q, %v; want only %s", got, err, rd.Digest)
	}
	if ml, ok := s.(registry.ManifestLister); ok {
		ds, err := ml.Manifests(ctx, repo)
		want := descDigests([]v1.Descriptor{md, report.Descriptor(), approval.Descriptor()})
		if got := descDigests(ds); err != nil || !slices.Equal(got, want) {
			t.Errorf("Manifests = %q, %v; want %q", got, err, want)
		}
	}
}

// ForceTag points repo:tag at desc whatever it points at now, bypassing
// the guard on plain tag writes (registry.CheckTagWrite) the way anyone
// who can write the store's bytes could: tests use it to make the damage
// the release log must detect. The store must be a TagSwapper.
func ForceTag(ctx context.Context, s registry.Store, repo, tag string, desc v1.Descriptor) error {
	sw, ok := s.(registry.TagSwapper)
	if !ok {
		return fmt.Errorf("%s cannot swap tags", s)
	}
	var old v1.Hash
	if cur, err := s.Resolve(ctx, repo, tag); err == nil {
		old = cur.Digest
	} else if !errors.Is(err, registry.ErrNotFound) {
		return err
	}
	return sw.SwapTag(ctx, repo, tag, old, desc)
}

// testGuardedTags: a plain Tag refuses the reserved prefixes (bad input)
// and a tag whose release head pointer exists (not authorised, the tag
// unchanged); SwapTag, the release path, still moves both.
func testGuardedTags(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/promo-scorer"
	d1 := Push(t, s, repo, "prod", NewArtifact(70, encoderType, nil, nil))
	d2 := Push(t, s, repo, "", NewArtifact(71, encoderType, nil, nil))
	rec := Push(t, s, repo, "", NewArtifact(72, "application/vnd.modelgate.release.v1", &d1, nil))
	for _, tag := range []string{"release-prod", "release-candidate", "sha256-" + d2.Digest.Hex, "sha256-x"} {
		err := s.Tag(ctx, repo, tag, d2)
		if errkind.Of(err) != errkind.BadInput || !strings.Contains(fmt.Sprint(err), "reserved") {
			t.Errorf("Tag %s: %v, want a bad-input refusal naming the tag reserved", tag, err)
		}
		if _, err := s.Resolve(ctx, repo, tag); !errors.Is(err, registry.ErrNotFound) {
			t.Errorf("after the refused Tag, %s resolves: %v", tag, err)
		}
	}
	// Before its release log starts, prod is a plain tag.
	if err := s.Tag(ctx, repo, "prod", d2); err != nil {
		t.Fatalf("Tag of a tag without a release log: %v", err)
	}
	sw, ok := s.(registry.TagSwapper)
	if !ok {
		t.Skipf("%s does not implement TagSwapper", s)
	}
	if err := sw.SwapTag(ctx, repo, "release-prod", v1.Hash{}, rec); err != nil {
		t.Fatalf("SwapTag of a head pointer: %v", err)
	}
	for _, tc := range []struct {
		tag  string
		desc v1.Descriptor
	}{{"prod", d1}, {"prod", d2}} { // a move, and a rewrite of the same target
		err := s.Tag(ctx, repo, tc.tag, tc.desc)
		if !errors.Is(err, registry.ErrGuarded) || errkind.Of(err) != errkind.Unauthorized ||
			!strings.Contains(err.Error(), "promote") || !strings.Contains(err.Error(), "rollback") {
			t.Errorf("Tag of a guarded tag to %s: %v, want ErrGuarded (not authorised) naming promote and rollback", tc.desc.Digest, err)
		}
	}
	if got, err := s.Resolve(ctx, repo, "prod"); err != nil || got.Digest != d2.Digest {
		t.Errorf("after refused Tags prod = %v, %v; want %s unchanged", got.Digest, err, d2.Digest)
	}
	if err := registry.CheckTagWrite(ctx, s, repo, "prod"); !errors.Is(err, registry.ErrGuarded) {
		t.Errorf("CheckTagWrite of the guarded tag: %v", err)
	}
	if err := registry.CheckTagWrite(ctx, s, repo, "canary"); err != nil {
		t.Errorf("CheckTagWrite of a plain tag: %v", err)
	}
	if err := sw.SwapTag(ctx, repo, "prod", d2.Digest, d1); err != nil {
		t.Errorf("SwapTag of the guarded tag (the release path): %v", err)
	}
	if err := sw.SwapTag(ctx, repo, "sha256-x", v1.Hash{}, d1); errkind.Of(err) != errkind.BadInput {
		t.Errorf("SwapTag of a sha256- tag: %v, want bad input", err)
	}
}

func testSwapTag(t *testing.T, s registry.Store) {
	sw, ok := s.(registry.TagSwapper)
	if !ok {
		t.Skipf("%s does not implement TagSwapper", s)
	}
	ctx := context.Background()
	const repo = "podcast/promo-scorer"
	d1 := Push(t, s, repo, "", NewArtifact(60, encoderType, nil, nil))
	d2 := Push(t, s, repo, "", NewArtifact(61, encoderType, nil, nil))
	d3 := Push(t, s, repo, "", NewArtifact(62, encoderType, nil, nil))

	if err := sw.SwapTag(ctx, repo, "prod", v1.Hash{}, d1); err != nil {
		t.Fatalf("create-only SwapTag: %v", err)
	}
	err := sw.SwapTag(ctx, repo, "prod", v1.Hash{}, d2)
	if !errors.Is(err, registry.ErrConflict) || errkind.Of(err) != errkind.Conflict {
		t.Errorf("second create-only SwapTag: %v, want ErrConflict of kind conflict", err)
	}
	if err := sw.SwapTag(ctx, repo, "prod", d1.Digest, d2); err != nil {
		t.Fatalf("SwapTag d1→d2: %v", err)
	}
	err = sw.SwapTag(ctx, repo, "prod", d1.Digest, d3) // stale old
	if !errors.Is(err, registry.ErrConflict) {
		t.Errorf("SwapTag with a stale old: %v, want ErrConflict", err)
	}
	if got, err := s.Resolve(ctx, repo, "prod"); err != nil || got.Digest != d2.Digest {
		t.Errorf("after a lost swap prod = %v, %v; want %s unchanged", got.Digest, err, d2.Digest)
	}
	err = sw.SwapTag(ctx, repo, "canary", d1.Digest, d3) // tag absent, old given
	if !errors.Is(err, registry.ErrConflict) {
		t.Errorf("SwapTag of an absent tag with an old digest: %v, want ErrConflict", err)
	}
	err = sw.SwapTag(ctx, repo, "prod", d2.Digest, NewArtifact(63, encoderType, nil, nil).Descriptor())
	wantNotFound(t, "SwapTag to a manifest not in the store", err)

	// Racing swaps from the same old: exactly one wins.
	const racers = 8
	var wins, conflicts int
	var mu sync.Mutex
	var wg sync.WaitGroup
	targets := []v1.Descriptor{d1, d3}
	for i := range racers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			err := sw.SwapTag(ctx, repo, "prod", d2.Digest, targets[i%2])
			mu.Lock()
			defer mu.Unlock()
			switch {
			case err == nil:
				wins++
			case errors.Is(err, registry.ErrConflict):
				conflicts++
			default:
				t.Errorf("racing SwapTag: %v", err)
			}
		}()
	}
	wg.Wait()
	if wins != 1 || conflicts != racers-1 {
		t.Errorf("racing swaps: %d won, %d conflicts; want 1 and %d", wins, conflicts, racers-1)
	}
}

func testManifests(t *testing.T, s registry.Store) {
	ml, ok := s.(registry.ManifestLister)
	if !ok {
		t.Skipf("%s does not implement ManifestLister", s)
	}
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	var want []v1.Descriptor
	for i := range 4 {
		tag := ""
		if i%2 == 0 {
			tag = fmt.Sprintf("v%d", i)
		}
		want = append(want, Push(t, s, repo, tag, NewArtifact(uint64(70+i), encoderType, nil, nil)))
	}
	Push(t, s, "podcast/shows", "prod", NewArtifact(80, encoderType, nil, nil))
	got, err := ml.Manifests(ctx, repo)
	if err != nil {
		t.Fatal(err)
	}
	if g, w := descDigests(got), descDigests(want); !slices.Equal(g, w) {
		t.Errorf("Manifests = %q, want %q", g, w)
	}
}

func testInvalidNames(t *testing.T, s registry.Store) {
	ctx := context.Background()
	b := NewBlob(90, 10)
	a := NewArtifact(91, encoderType, nil, nil)
	Push(t, s, "podcast/shows", "prod", a)
	badRepos := []string{"", "Podcast/Shows", "podcast//shows", "podcast/shows/", "-shows", "shows..x", "podcast/../etc", strings.Repeat("a", 256)}
	badTags := []string{"", "-prod", ".prod", "prod/1", "prod:1", strings.Repeat("t", 129)}
	check := func(what string, err error) {
		t.Helper()
		if err == nil {
			t.Errorf("%s: accepted", what)
		} else if errkind.Of(err) != errkind.BadInput {
			t.Errorf("%s: error kind %v, want bad input: %v", what, errkind.Of(err), err)
		}
	}
	for _, r := range badRepos {
		check("PutBlob repo "+r, s.PutBlob(ctx, r, b.Digest, 10, bytes.NewReader(b.Data)))
		_, err := s.Blob(ctx, r, b.Digest)
		check("Blob repo "+r, err)
		_, err = s.StatBlob(ctx, r, b.Digest)
		check("StatBlob repo "+r, err)
		_, err = s.PutManifest(ctx, r, types.OCIManifestSchema1, a.Manifest.Data)
		check("PutManifest repo "+r, err)
		_, _, err = s.Manifest(ctx, r, a.Manifest.Digest)
		check("Manifest repo "+r, err)
		_, err = s.Resolve(ctx, r, "prod")
		check("Resolve repo "+r, err)
		check("Tag repo "+r, s.Tag(ctx, r, "prod", a.Descriptor()))
		_, err = s.Tags(ctx, r)
		check("Tags repo "+r, err)
		_, err = s.Referrers(ctx, r, a.Manifest.Digest, "")
		check("Referrers repo "+r, err)
	}
	for _, tg := range badTags {
		_, err := s.Resolve(ctx, "podcast/shows", tg)
		check("Resolve tag "+tg, err)
		check("Tag tag "+tg, s.Tag(ctx, "podcast/shows", tg, a.Descriptor()))
		if sw, ok := s.(registry.TagSwapper); ok {
			check("SwapTag tag "+tg, sw.SwapTag(ctx, "podcast/shows", tg, v1.Hash{}, a.Descriptor()))
		}
	}
	badDigests := []v1.Hash{
		{Algorithm: "sha256", Hex: "../../../../etc/passwd"},
		{Algorithm: "sha512", Hex: strings.Repeat("a", 128)},
		{Algorithm: "sha256", Hex: strings.Repeat("A", 64)},
		{},
	}
	for _, d := range badDigests {
		check("PutBlob digest "+d.String(), s.PutBlob(ctx, "podcast/shows", d, 10, bytes.NewReader(b.Data)))
		_, err := s.Blob(ctx, "podcast/shows", d)
		check("Blob digest "+d.String(), err)
		_, err = s.StatBlob(ctx, "podcast/shows", d)
		check("StatBlob digest "+d.String(), err)
		_, _, err = s.Manifest(ctx, "podcast/shows", d)
		check("Manifest digest "+d.String(), err)
	}
	if tags, err := s.Tags(ctx, "podcast/shows"); err != nil || !slices.Equal(tags, []string{"prod"}) {
		t.Errorf("after refused calls Tags = %q, %v; want [prod]", tags, err)
	}
}

func testConcurrent(t *testing.T, s registry.Store) {
	ctx := context.Background()
	const repo = "podcast/episodes-played"
	const writers = 16
	shared := NewBlob(100, 64<<10)
	arts := make([]Artifact, writers)
	for i := range arts {
		arts[i] = NewArtifact(uint64(200+i), encoderType, nil, nil)
	}
	var wg sync.WaitGroup
	errs := make(chan error, writers)
	for i := range writers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			// Every writer also pushes the same shared blob, racing on it.
			if err := s.PutBlob(ctx, repo, shared.Digest, int64(len(shared.Data)), bytes.NewReader(shared.Data)); err != nil {
				errs <- fmt.Errorf("writer %d: shared blob: %w", i, err)
				return
			}
			a := arts[i]
			for _, b := range append([]Blob{a.Config}, a.Layers...) {
				if err := s.PutBlob(ctx, repo, b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); err != nil {
					errs <- fmt.Errorf("writer %d: %w", i, err)
					return
				}
			}
			desc, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data)
			if err != nil {
				errs <- fmt.Errorf("writer %d: %w", i, err)
				return
			}
			if err := s.Tag(ctx, repo, fmt.Sprintf("w-%02d", i), desc); err != nil {
				errs <- fmt.Errorf("writer %d: %w", i, err)
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Error(err)
	}
	tags, err := s.Tags(ctx, repo)
	if err != nil || len(tags) != writers {
		t.Fatalf("Tags = %q, %v; want %d tags", tags, err, writers)
	}
	for i, a := range arts {
		d, err := s.Resolve(ctx, repo, fmt.Sprintf("w-%02d", i))
		if err != nil || d.Digest != a.Manifest.Digest {
			t.Errorf("w-%02d resolves to %v, %v; want %s", i, d.Digest, err, a.Manifest.Digest)
			continue
		}
		if raw, _, err := s.Manifest(ctx, repo, d.Digest); err != nil || !bytes.Equal(raw, a.Manifest.Data) {
			t.Errorf("manifest of w-%02d: %v", i, err)
		}
	}
	if !bytes.Equal(readBlob(t, s, repo, shared.Digest), shared.Data) {
		t.Error("shared blob differs after concurrent puts")
	}
}

// RaceResult is the outcome of SwapRace.
type RaceResult struct {
	Base      v1.Descriptor   // what the tag pointed at before the race
	Targets   []v1.Descriptor // racer i swapped the tag to Targets[i]
	Winners   []int           // racers whose SwapTag returned nil
	Conflicts []int           // racers whose SwapTag lost with ErrConflict
	Final     v1.Descriptor   // what the tag points at after the race
}

// SwapRace makes len(clients) racers, each through its own client of the
// same backing store (clients[i] may be one store value or separate
// connections, as separate processes would have), swap repo:tag from the
// same old target to a target of their own at the same moment. Errors
// other than ErrConflict fail the test. The caller judges the result
// against the guarantee its store claims.
func SwapRace(t *testing.T, clients []registry.Store, repo, tag string) RaceResult {
	t.Helper()
	ctx := context.Background()
	s0 := clients[0]
	var res RaceResult
	res.Base = Push(t, s0, repo, tag, NewArtifact(900, encoderType, nil, nil))
	for i := range clients {
		res.Targets = append(res.Targets, Push(t, s0, repo, "", NewArtifact(uint64(901+i), encoderType, nil, nil)))
	}
	errs := make([]error, len(clients))
	start := make(chan struct{})
	var wg sync.WaitGroup
	for i, c := range clients {
		sw, ok := c.(registry.TagSwapper)
		if !ok {
			t.Fatalf("%s does not implement TagSwapper", c)
		}
		wg.Add(1)
		go func() {
			defer wg.Done()
			<-start
			errs[i] = sw.SwapTag(ctx, repo, tag, res.Base.Digest, res.Targets[i])
		}()
	}
	close(start)
	wg.Wait()
	for i, err := range errs {
		switch {
		case err == nil:
			res.Winners = append(res.Winners, i)
		case errors.Is(err, registry.ErrConflict) && errkind.Of(err) == errkind.Conflict:
			res.Conflicts = append(res.Conflicts, i)
		default:
			t.Errorf("racer %d: %v (want nil or ErrConflict of kind conflict)", i, err)
		}
	}
	final, err := s0.Resolve(ctx, repo, tag)
	if err != nil {
		t.Fatalf("Resolve after the race: %v", err)
	}
	res.Final = final
	return res
}

// testStaged checks BlobStager: the store's digest is the content's sha256
// (the FIPS 180-2 example "abc" gives the published digest), nothing is
// visible before Commit, Discard leaves nothing, a wrong length is refused,
// and committing content already present reports it.
func testStaged(t *testing.T, s registry.Store) {
	st, ok := s.(registry.BlobStager)
	if !ok {
		t.Skip("store cannot stage blobs")
	}
	ctx := context.Background()
	const repo = "podcast/listener-encoder"

	// FIPS 180-2, Appendix B.1: SHA-256("abc").
	const abc = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
	sb, err := st.StageBlob(ctx, repo, 3, strings.NewReader("abc"))
	if err != nil {
		t.Fatalf("StageBlob: %v", err)
	}
	if sb.Digest().String() != "sha256:"+abc || sb.Size() != 3 {
		t.Fatalf("staged %s (%d bytes), want sha256:%s (3 bytes)", sb.Digest(), sb.Size(), abc)
	}
	_, err = s.StatBlob(ctx, repo, sb.Digest())
	wantNotFound(t, "StatBlob before Commit", err)
	existed, err := sb.Commit(ctx)
	if err != nil || existed {
		t.Fatalf("Commit = %v, %v; want false, nil", existed, err)
	}
	if got := readBlob(t, s, repo, sb.Digest()); string(got) != "abc" {
		t.Errorf("committed blob reads %q", got)
	}
	if again, err := sb.Commit(ctx); err != nil || again {
		t.Errorf("second Commit = %v, %v; want the first one's false, nil", again, err)
	}
	if err := sb.Discard(); err != nil {
		t.Errorf("Discard after Commit: %v", err)
	}
	if got := readBlob(t, s, repo, sb.Digest()); string(got) != "abc" {
		t.Errorf("blob after Discard-after-Commit reads %q", got)
	}

	// The same bytes staged again: Commit reports them present.
	sb2, err := st.StageBlob(ctx, repo, 3, strings.NewReader("abc"))
	if err != nil {
		t.Fatal(err)
	}
	if existed, err := sb2.Commit(ctx); err != nil || !existed {
		t.Errorf("Commit of present content = %v, %v; want true, nil", existed, err)
	}

	// A large blob, discarded: nothing appears.
	big := NewBlob(21, 3<<20+5)
	sb3, err := st.StageBlob(ctx, repo, int64(len(big.Data)), bytes.NewReader(big.Data))
	if err != nil {
		t.Fatal(err)
	}
	if sb3.Digest() != big.Digest {
		t.Errorf("staged digest %s, want %s", sb3.Digest(), big.Digest)
	}
	if err := sb3.Discard(); err != nil {
		t.Errorf("Discard: %v", err)
	}
	if _, err := sb3.Commit(ctx); err == nil {
		t.Error("Commit after Discard succeeded")
	}
	_, err = s.StatBlob(ctx, repo, big.Digest)
	wantNotFound(t, "StatBlob after Discard", err)

	// Wrong lengths are refused as bad input.
	for _, c := range []struct {
		name string
		size int64
		data string
	}{{"short", 4, "abc"}, {"long", 2, "abc"}} {
		_, err := st.StageBlob(ctx, repo, c.size, strings.NewReader(c.data))
		if !errors.Is(err, registry.ErrDigestMismatch) || errkind.Of(err) != errkind.BadInput {
			t.Errorf("%s body: got %v, want a bad-input ErrDigestMismatch", c.name, err)
		}
	}
}
