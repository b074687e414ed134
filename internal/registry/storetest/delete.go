package storetest

import (
	"context"
	"errors"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

const releaseType = "application/vnd.modelgate.release.v1"

// deleter returns s's Deleter or skips the test.
func deleter(t *testing.T, s registry.Store) registry.Deleter {
	t.Helper()
	d, ok := s.(registry.Deleter)
	if !ok {
		t.Skipf("%s does not implement Deleter", s)
	}
	return d
}

// noDamage fails the test when s is a Scrubber whose check finds damage.
// referenced are the blobs the manifests still in the store reference.
func noDamage(t *testing.T, s registry.Store, referenced ...Artifact) {
	t.Helper()
	sc, ok := s.(registry.Scrubber)
	if !ok {
		return
	}
	ref := map[v1.Hash]bool{}
	for _, a := range referenced {
		ref[a.Config.Digest] = true
		for _, l := range a.Layers {
			ref[l.Digest] = true
		}
	}
	fs, err := sc.Scrub(context.Background(), ref)
	if err != nil {
		t.Fatalf("Scrub: %v", err)
	}
	for _, f := range fs {
		if f.Severity == registry.SeverityDamage {
			t.Errorf("Scrub after removal: damage at %s: %s", f.Where, f.Message)
		}
	}
}

func testDeleteTag(t *testing.T, s registry.Store) {
	d := deleter(t, s)
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	a, b := NewArtifact(80, encoderType, nil, nil), NewArtifact(81, encoderType, nil, nil)
	da := Push(t, s, repo, "candidate-1", a)
	db := Push(t, s, repo, "candidate-2", b)

	err := d.DeleteTag(ctx, repo, "candidate-1", db.Digest)
	if !errors.Is(err, registry.ErrConflict) || errkind.Of(err) != errkind.Conflict {
		t.Errorf("DeleteTag of a tag that points elsewhere: %v, want ErrConflict (conflict)", err)
	}
	if got, err := s.Resolve(ctx, repo, "candidate-1"); err != nil || got.Digest != da.Digest {
		t.Fatalf("after the refused DeleteTag: %v, %v; want the tag at %s", got.Digest, err, da.Digest)
	}
	for _, tc := range []struct {
		tag  string
		want v1.Hash
	}{{"candidate-1", v1.Hash{}}, {"release-candidate-1", da.Digest}, {"sha256-" + da.Digest.Hex, da.Digest}, {"bad tag", da.Digest}} {
		if err := d.DeleteTag(ctx, repo, tc.tag, tc.want); errkind.Of(err) != errkind.BadInput {
			t.Errorf("DeleteTag(%q, %q): %v, want bad input", tc.tag, tc.want, err)
		}
	}

	if err := d.DeleteTag(ctx, repo, "candidate-1", da.Digest); err != nil {
		t.Fatalf("DeleteTag: %v", err)
	}
	if _, err := s.Resolve(ctx, repo, "candidate-1"); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("Resolve after DeleteTag: %v, want ErrNotFound", err)
	}
	if tags, err := s.Tags(ctx, repo); err != nil || len(tags) != 1 || tags[0] != "candidate-2" {
		t.Errorf("Tags after DeleteTag = %v, %v; want [candidate-2]", tags, err)
	}
	if got, err := s.Resolve(ctx, repo, "candidate-2"); err != nil || got.Digest != db.Digest {
		t.Errorf("the other tag after DeleteTag: %v, %v", got.Digest, err)
	}
	if err := d.DeleteTag(ctx, repo, "candidate-1", da.Digest); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("DeleteTag of a removed tag: %v, want ErrNotFound", err)
	}
	// The tag can be written again.
	if err := s.Tag(ctx, repo, "candidate-1", db); err != nil {
		t.Errorf("Tag after DeleteTag: %v", err)
	}
	noDamage(t, s, a, b)
}

// testDeleteGuarded: a tag with a release log, its head pointer, a tagged
// manifest and a release record are never removed.
func testDeleteGuarded(t *testing.T, s registry.Store) {
	d := deleter(t, s)
	sw, ok := s.(registry.TagSwapper)
	if !ok {
		t.Skipf("%s does not implement TagSwapper", s)
	}
	ctx := context.Background()
	const repo = "podcast/promo-scorer"
	model := NewArtifact(82, encoderType, nil, nil)
	dm := Push(t, s, repo, "prod", model)
	recArt := NewArtifact(83, releaseType, &dm, nil)
	rec := Push(t, s, repo, "", recArt)
	if err := sw.SwapTag(ctx, repo, "release-prod", v1.Hash{}, rec); err != nil {
		t.Fatalf("SwapTag of the head pointer: %v", err)
	}
	err := d.DeleteTag(ctx, repo, "prod", dm.Digest)
	if !errors.Is(err, registry.ErrGuarded) || errkind.Of(err) != errkind.Unauthorized {
		t.Errorf("DeleteTag of a tag with a release log: %v, want ErrGuarded (not authorised)", err)
	}
	if err := d.DeleteTag(ctx, repo, "release-prod", rec.Digest); errkind.Of(err) != errkind.BadInput {
		t.Errorf("DeleteTag of a head pointer: %v, want bad input", err)
	}
	err = d.DeleteManifest(ctx, repo, dm.Digest)
	if !errors.Is(err, registry.ErrConflict) && !errors.Is(err, registry.ErrGuarded) {
		t.Errorf("DeleteManifest of a released model: %v, want a refusal", err)
	}
	err = d.DeleteManifest(ctx, repo, rec.Digest)
	if !errors.Is(err, registry.ErrGuarded) && !errors.Is(err, registry.ErrConflict) {
		t.Errorf("DeleteManifest of the head's release record: %v, want a refusal", err)
	}
	// An older record no tag names is refused for what it is.
	old := Push(t, s, repo, "", NewArtifact(84, releaseType, &dm, map[string]string{"dev.modelgate.release.previous": rec.Digest.String()}))
	err = d.DeleteManifest(ctx, repo, old.Digest)
	if !errors.Is(err, registry.ErrGuarded) || errkind.Of(err) != errkind.Unauthorized {
		t.Errorf("DeleteManifest of a release record: %v, want ErrGuarded (not authorised)", err)
	}
	for _, tc := range []struct{ tag, want string }{{"prod", dm.Digest.String()}, {"release-prod", rec.Digest.String()}} {
		if got, err := s.Resolve(ctx, repo, tc.tag); err != nil || got.Digest.String() != tc.want {
			t.Errorf("after the refusals %s = %v, %v; want %s", tc.tag, got.Digest, err, tc.want)
		}
	}
	for _, h := range []v1.Hash{dm.Digest, rec.Digest, old.Digest} {
		if _, _, err := s.Manifest(ctx, repo, h); err != nil {
			t.Errorf("after the refusals manifest %s: %v", h, err)
		}
	}
}

func testDeleteManifest(t *testing.T, s registry.Store) {
	d := deleter(t, s)
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	model := NewArtifact(85, encoderType, nil, nil)
	dm := Push(t, s, repo, "candidate-7", model)
	report := NewArtifact(86, reportType, &dm, nil)
	dr := Push(t, s, repo, "", report)
	keep := NewArtifact(87, encoderType, nil, nil)
	dk := Push(t, s, repo, "", keep)

	err := d.DeleteManifest(ctx, repo, dm.Digest)
	if !errors.Is(err, registry.ErrConflict) || errkind.Of(err) != errkind.Conflict {
		t.Errorf("DeleteManifest of a tagged manifest: %v, want ErrConflict (conflict)", err)
	}
	if _, _, err := s.Manifest(ctx, repo, dm.Digest); err != nil {
		t.Fatalf("after the refused DeleteManifest: %v", err)
	}

	// Referrers first, then the tag, then the manifest.
	if err := d.DeleteManifest(ctx, repo, dr.Digest); err != nil {
		t.Fatalf("DeleteManifest of a referrer: %v", err)
	}
	if rs, err := s.Referrers(ctx, repo, dm.Digest, ""); err != nil || len(rs) != 0 {
		t.Errorf("Referrers after removing the only referrer = %v, %v; want none", descDigests(rs), err)
	}
	if err := d.DeleteTag(ctx, repo, "candidate-7", dm.Digest); err != nil {
		t.Fatalf("DeleteTag: %v", err)
	}
	if err := d.DeleteManifest(ctx, repo, dm.Digest); err != nil {
		t.Fatalf("DeleteManifest: %v", err)
	}
	for _, h := range []v1.Hash{dm.Digest, dr.Digest} {
		if _, _, err := s.Manifest(ctx, repo, h); !errors.Is(err, registry.ErrNotFound) {
			t.Errorf("Manifest %s after DeleteManifest: %v, want ErrNotFound", h, err)
		}
		if err := d.DeleteManifest(ctx, repo, h); err != nil {
			t.Errorf("DeleteManifest again (idempotent): %v", err)
		}
	}
	if _, _, err := s.Manifest(ctx, repo, dk.Digest); err != nil {
		t.Errorf("the manifest left alone: %v", err)
	}
	if ml, ok := s.(registry.ManifestLister); ok {
		ms, err := ml.Manifests(ctx, repo)
		if err != nil || len(ms) != 1 || ms[0].Digest != dk.Digest {
			t.Errorf("Manifests after removals = %v, %v; want only %s", descDigests(ms), err, dk.Digest)
		}
	}
	if mt, err := d.ManifestTimes(ctx, repo); err == nil {
		if _, ok := mt[dm.Digest]; ok || mt[dk.Digest].IsZero() {
			t.Errorf("ManifestTimes after removal = %v; want %s dated and %s absent", mt, dk.Digest, dm.Digest)
		}
	} else if !errors.Is(err, errors.ErrUnsupported) {
		t.Errorf("ManifestTimes: %v", err)
	}
	// Config and layers stay until DeleteBlob.
	if got := readBlob(t, s, repo, model.Layers[0].Digest); len(got) != len(model.Layers[0].Data) {
		t.Errorf("a layer of the removed manifest: %d bytes, want %d", len(got), len(model.Layers[0].Data))
	}
	noDamage(t, s, keep, model)

	// The same manifest can be put and tagged again.
	if got := Push(t, s, repo, "candidate-7", model); got.Digest != dm.Digest {
		t.Errorf("re-put digest %s, want %s", got.Digest, dm.Digest)
	}
	if got, err := s.Resolve(ctx, repo, "candidate-7"); err != nil || got.Digest != dm.Digest {
		t.Errorf("after re-put: %v, %v", got.Digest, err)
	}
	noDamage(t, s, keep, model)
}

func testDeleteBlob(t *testing.T, s registry.Store) {
	d := deleter(t, s)
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	keep := NewArtifact(88, encoderType, nil, nil)
	Push(t, s, repo, "kept", keep)
	gone := NewArtifact(89, encoderType, nil, nil)
	dg := Push(t, s, repo, "", gone)

	blobs, err := d.Blobs(ctx, repo)
	if errors.Is(err, errors.ErrUnsupported) {
		if err := d.DeleteBlob(ctx, repo, gone.Layers[0].Digest); !errors.Is(err, errors.ErrUnsupported) {
			t.Errorf("DeleteBlob on a store that does not list blobs: %v, want ErrUnsupported", err)
		}
		return
	}
	if err != nil {
		t.Fatalf("Blobs: %v", err)
	}
	listed := map[v1.Hash]int64{}
	for _, b := range blobs {
		listed[b.Digest] = b.Size
		if b.Modified.IsZero() {
			t.Errorf("Blobs: %s has no modification time", b.Digest)
		}
	}
	for _, a := range []Artifact{keep, gone} {
		for _, b := range append([]Blob{a.Config}, a.Layers...) {
			if listed[b.Digest] != int64(len(b.Data)) {
				t.Errorf("Blobs lists %s with %d bytes, want %d", b.Digest, listed[b.Digest], len(b.Data))
			}
		}
		if _, ok := listed[a.Manifest.Digest]; ok {
			t.Errorf("Blobs lists manifest %s", a.Manifest.Digest)
		}
	}

	if err := d.DeleteManifest(ctx, repo, dg.Digest); err != nil {
		t.Fatalf("DeleteManifest: %v", err)
	}
	for _, b := range append([]Blob{gone.Config}, gone.Layers...) {
		if err := d.DeleteBlob(ctx, repo, b.Digest); err != nil {
			t.Fatalf("DeleteBlob %s: %v", b.Digest, err)
		}
		if _, err := s.StatBlob(ctx, repo, b.Digest); !errors.Is(err, registry.ErrNotFound) {
			t.Errorf("StatBlob after DeleteBlob: %v, want ErrNotFound", err)
		}
		if err := d.DeleteBlob(ctx, repo, b.Digest); err != nil {
			t.Errorf("DeleteBlob again (idempotent): %v", err)
		}
	}
	if got := readBlob(t, s, repo, keep.Layers[0].Digest); len(got) != len(keep.Layers[0].Data) {
		t.Errorf("a blob left alone: %d bytes", len(got))
	}
	after, err := d.Blobs(ctx, repo)
	if err != nil {
		t.Fatalf("Blobs: %v", err)
	}
	for _, b := range after {
		if b.Digest == gone.Layers[0].Digest || b.Digest == dg.Digest {
			t.Errorf("Blobs after removal still lists %s", b.Digest)
		}
	}
	noDamage(t, s, keep)
	// A removed blob can be uploaded again.
	Push(t, s, repo, "again", gone)
	noDamage(t, s, keep, gone)
}
