package storetest

import (
	"bytes"
	"context"
	"errors"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/registry"
)

// ReuseRaces checks a store that is a registry.Refresher and a
// registry.VersionedDeleter: a writer that pushes exactly the bytes of an
// artifact a collector judged old (so reuses its blobs or manifest instead
// of uploading them) keeps it, at each point of the removal a test can
// reach exactly. inside(f) makes f run once inside the store's next
// conditional removal, after the store checked the version and before it
// removes anything (a test hook of the store, or of its transport). f does
// not tag: a local store's removal holds the lock tags take.
//
// Every case names what the collector saw (the versions from
// ManifestStamps and Blobs), then lets the writer act, then removes.
func ReuseRaces(t *testing.T, s registry.Store, inside func(f func())) {
	ctx := context.Background()
	vd, ok := s.(registry.VersionedDeleter)
	if !ok {
		t.Fatalf("%s is not a VersionedDeleter", s)
	}
	del := deleter(t, s)
	const at = "application/vnd.modelgate.encoder.v1"
	// old pushes a and untags it (a candidate the collector may remove),
	// and returns the manifest's and the blobs' versions.
	old := func(t *testing.T, repo string, a Artifact) (string, map[v1.Hash]string) {
		t.Helper()
		d := Push(t, s, repo, "ci", a)
		if err := del.DeleteTag(ctx, repo, "ci", d.Digest); err != nil {
			t.Fatal(err)
		}
		ms, err := vd.ManifestStamps(ctx, repo)
		if err != nil {
			t.Fatal(err)
		}
		if ms[d.Digest].Version == "" {
			t.Fatalf("no version for %s in %+v", d.Digest, ms)
		}
		bs, err := del.Blobs(ctx, repo)
		if err != nil {
			t.Fatal(err)
		}
		vs := map[v1.Hash]string{}
		for _, b := range bs {
			vs[b.Digest] = b.Version
		}
		for _, b := range append([]Blob{a.Config}, a.Layers...) {
			if vs[b.Digest] == "" {
				t.Fatalf("no version for blob %s", b.Digest)
			}
		}
		return ms[d.Digest].Version, vs
	}
	// whole checks that a's manifest and every blob are there and read
	// back verified.
	whole := func(t *testing.T, repo string, a Artifact) {
		t.Helper()
		if _, _, err := s.Manifest(ctx, repo, a.Manifest.Digest); err != nil {
			t.Errorf("the artifact pushed again: its manifest: %v", err)
		}
		for _, b := range append([]Blob{a.Config}, a.Layers...) {
			if got := readBlob(t, s, repo, b.Digest); !bytes.Equal(got, b.Data) {
				t.Errorf("blob %s read back wrong", b.Digest)
			}
		}
	}
	inUse := func(t *testing.T, what string, err error) {
		t.Helper()
		if !errors.Is(err, registry.ErrInUse) || !errors.Is(err, registry.ErrConflict) {
			t.Errorf("%s: %v, want ErrInUse", what, err)
		}
	}
	blobs := func(a Artifact) []Blob { return append([]Blob{a.Config}, a.Layers...) }

	t.Run("unchanged is removed", func(t *testing.T) {
		const repo = "podcast/reuse-none"
		a := NewArtifact(801, at, nil, nil)
		vm, vb := old(t, repo, a)
		if err := vd.DeleteManifestIf(ctx, repo, a.Manifest.Digest, vm); err != nil {
			t.Fatal(err)
		}
		for _, b := range blobs(a) {
			if err := vd.DeleteBlobIf(ctx, repo, b.Digest, vb[b.Digest]); err != nil {
				t.Fatal(err)
			}
			_, err := s.StatBlob(ctx, repo, b.Digest)
			wantNotFound(t, "a removed blob", err)
		}
		_, _, err := s.Manifest(ctx, repo, a.Manifest.Digest)
		wantNotFound(t, "a removed manifest", err)
		// A writer coming after the removal finds nothing to reuse and
		// uploads.
		_, err = registry.ReuseBlob(ctx, s, repo, a.Layers[0].Digest)
		wantNotFound(t, "reusing a removed blob", err)
		_, err = registry.ReuseManifest(ctx, s, repo, a.Manifest.Digest)
		wantNotFound(t, "reusing a removed manifest", err)
		if err := ReusePush(ctx, s, repo, "again", a); err != nil {
			t.Fatal(err)
		}
		whole(t, repo, a)
	})

	t.Run("blobs reused after the mark", func(t *testing.T) {
		const repo = "podcast/reuse-blobs"
		a := NewArtifact(802, at, nil, nil)
		vm, vb := old(t, repo, a)
		if err := vd.DeleteManifestIf(ctx, repo, a.Manifest.Digest, vm); err != nil {
			t.Fatal(err)
		}
		if err := ReusePush(ctx, s, repo, "again", a); err != nil {
			t.Fatal(err)
		}
		for _, b := range blobs(a) {
			inUse(t, "removing a blob a push reused", vd.DeleteBlobIf(ctx, repo, b.Digest, vb[b.Digest]))
		}
		whole(t, repo, a)
	})

	t.Run("blobs reused inside their removal", func(t *testing.T) {
		const repo = "podcast/reuse-blobs-inside"
		a := NewArtifact(803, at, nil, nil)
		vm, vb := old(t, repo, a)
		if err := vd.DeleteManifestIf(ctx, repo, a.Manifest.Digest, vm); err != nil {
			t.Fatal(err)
		}
		ran := false
		inside(func() {
			ran = true
			if err := ReusePush(ctx, s, repo, "", a); err != nil {
				t.Errorf("pushing again inside the removal: %v", err)
			}
		})
		inUse(t, "removing a blob a push reused meanwhile", vd.DeleteBlobIf(ctx, repo, a.Layers[0].Digest, vb[a.Layers[0].Digest]))
		if !ran {
			t.Fatal("the push inside the removal did not run")
		}
		for _, b := range blobs(a) {
			inUse(t, "removing a blob a push reused", vd.DeleteBlobIf(ctx, repo, b.Digest, vb[b.Digest]))
		}
		if err := s.Tag(ctx, repo, "again", a.Descriptor()); err != nil {
			t.Fatal(err)
		}
		whole(t, repo, a)
	})

	t.Run("manifest reused after the mark", func(t *testing.T) {
		const repo = "podcast/reuse-manifest"
		a := NewArtifact(804, at, nil, nil)
		vm, _ := old(t, repo, a)
		// A writer puts the same manifest again (untagged, as a release
		// record or a report is put).
		if _, err := s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data); err != nil {
			t.Fatal(err)
		}
		inUse(t, "removing a manifest put again", vd.DeleteManifestIf(ctx, repo, a.Manifest.Digest, vm))
		// A push reuses it (and then tags it).
		ms, err := vd.ManifestStamps(ctx, repo)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := registry.ReuseManifest(ctx, s, repo, a.Manifest.Digest); err != nil {
			t.Fatal(err)
		}
		inUse(t, "removing a manifest a push reused", vd.DeleteManifestIf(ctx, repo, a.Manifest.Digest, ms[a.Manifest.Digest].Version))
		if err := s.Tag(ctx, repo, "again", a.Descriptor()); err != nil {
			t.Fatal(err)
		}
		whole(t, repo, a)
	})

	t.Run("manifest reused inside its removal", func(t *testing.T) {
		const repo = "podcast/reuse-manifest-inside"
		a := NewArtifact(805, at, nil, nil)
		vm, _ := old(t, repo, a)
		ran := false
		inside(func() {
			ran = true
			if _, err := registry.ReuseManifest(ctx, s, repo, a.Manifest.Digest); err != nil {
				t.Errorf("reusing the manifest inside its removal: %v", err)
			}
		})
		inUse(t, "removing a manifest a push reused meanwhile", vd.DeleteManifestIf(ctx, repo, a.Manifest.Digest, vm))
		if !ran {
			t.Fatal("the reuse inside the removal did not run")
		}
		if err := s.Tag(ctx, repo, "again", a.Descriptor()); err != nil {
			t.Fatal(err)
		}
		whole(t, repo, a)
	})
}

// ReusePush pushes a as modelgate's push does: each blob the store has is
// reused (registry.ReuseBlob), the others uploaded; the manifest is
// reused when present (registry.ReuseManifest), else put; then tagged,
// unless tag is "".
func ReusePush(ctx context.Context, s registry.Store, repo, tag string, a Artifact) error {
	for _, b := range append([]Blob{a.Config}, a.Layers...) {
		_, err := registry.ReuseBlob(ctx, s, repo, b.Digest)
		if errors.Is(err, registry.ErrNotFound) {
			err = s.PutBlob(ctx, repo, b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data))
		}
		if err != nil {
			return err
		}
	}
	desc, err := registry.ReuseManifest(ctx, s, repo, a.Manifest.Digest)
	if errors.Is(err, registry.ErrNotFound) {
		desc, err = s.PutManifest(ctx, repo, types.OCIManifestSchema1, a.Manifest.Data)
	}
	if err != nil {
		return err
	}
	if tag != "" {
		return s.Tag(ctx, repo, tag, desc)
	}
	return nil
}
