package registry_test

import (
	"context"
	"errors"
	"os"
	"path/filepath"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// scrubDamage returns the damage Scrub finds in l.
func scrubDamage(t *testing.T, l *registry.Local) []registry.Finding {
	t.Helper()
	fs, err := l.Scrub(context.Background(), nil)
	if err != nil {
		t.Fatal(err)
	}
	var out []registry.Finding
	for _, f := range fs {
		if f.Severity == registry.SeverityDamage {
			out = append(out, f)
		}
	}
	return out
}

// TestLocalDeleteManifestCrashStates leaves the store in the state a
// crash after each step of DeleteManifest would (the steps done by hand,
// in its order), checks Scrub finds no damage there, and that calling
// DeleteManifest again (and DeleteBlob on the blobs Blobs then lists)
// finishes the job.
func TestLocalDeleteManifestCrashStates(t *testing.T) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	for _, step := range []string{"referrer file", "manifest file", "blob aside"} {
		t.Run(step, func(t *testing.T) {
			l := openLocal(t)
			model := storetest.NewArtifact(90, "application/vnd.modelgate.encoder.v1", nil, nil)
			dm := storetest.Push(t, l, repo, "", model)
			report := storetest.NewArtifact(91, "application/vnd.modelgate.report.v1", &dm, nil)
			dr := storetest.Push(t, l, repo, "", report)
			side := filepath.Join(l.Dir(), ".modelgate", "repos", "podcast+listener-encoder")
			refFile := filepath.Join(side, "referrers", dm.Digest.Hex, "application%2Fvnd.modelgate.report.v1", dr.Digest.Hex)
			manFile := filepath.Join(side, "manifests", dr.Digest.Hex)
			blob := filepath.Join(l.Dir(), "blobs", "sha256", dr.Digest.Hex)
			mustRemove := func(p string) {
				t.Helper()
				if err := os.Remove(p); err != nil {
					t.Fatal(err)
				}
			}
			mustRemove(refFile)
			if step != "referrer file" {
				mustRemove(manFile)
			}
			if step == "blob aside" {
				if err := os.Rename(blob, filepath.Join(l.Dir(), ".modelgate", "tmp", "removing-"+dr.Digest.Hex)); err != nil {
					t.Fatal(err)
				}
			}
			if d := scrubDamage(t, l); len(d) != 0 {
				t.Fatalf("Scrub after a crash at %s: damage %v", step, d)
			}
			if err := l.DeleteManifest(ctx, repo, dr.Digest); err != nil {
				t.Fatalf("DeleteManifest rerun: %v", err)
			}
			blobs, err := l.Blobs(ctx, repo)
			if err != nil {
				t.Fatal(err)
			}
			live := map[v1.Hash]bool{dm.Digest: true, model.Config.Digest: true}
			for _, b := range model.Layers {
				live[b.Digest] = true
			}
			for _, b := range blobs {
				if !live[b.Digest] {
					if err := l.DeleteBlob(ctx, repo, b.Digest); err != nil {
						t.Fatalf("DeleteBlob %s: %v", b.Digest, err)
					}
				}
			}
			if _, err := os.Stat(blob); !errors.Is(err, os.ErrNotExist) {
				t.Errorf("the report's blob is still there: %v", err)
			}
			if _, _, err := l.Manifest(ctx, repo, dr.Digest); !errors.Is(err, registry.ErrNotFound) {
				t.Errorf("Manifest after the rerun: %v", err)
			}
			fs, err := l.Scrub(ctx, live)
			if err != nil {
				t.Fatal(err)
			}
			for _, f := range fs {
				if f.Severity == registry.SeverityDamage || f.Where == "sha256:"+dr.Digest.Hex || f.Where == "sha256:"+report.Config.Digest.Hex {
					t.Errorf("Scrub after the rerun: %+v", f)
				}
			}
		})
	}
}

// TestLocalDeleteSharedManifest: blobs are shared by the repositories of
// a directory, so a manifest removed from one repository keeps its bytes
// while another records it, and DeleteBlob refuses a recorded manifest.
func TestLocalDeleteSharedManifest(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	a := storetest.NewArtifact(92, "application/vnd.modelgate.encoder.v1", nil, nil)
	d := storetest.Push(t, l, "podcast/one", "", a)
	storetest.Push(t, l, "podcast/two", "", a)
	if err := l.DeleteBlob(ctx, "podcast/one", d.Digest); !errors.Is(err, registry.ErrConflict) || errkind.Of(err) != errkind.Conflict {
		t.Errorf("DeleteBlob of a recorded manifest: %v, want ErrConflict", err)
	}
	if err := l.DeleteManifest(ctx, "podcast/one", d.Digest); err != nil {
		t.Fatal(err)
	}
	if _, _, err := l.Manifest(ctx, "podcast/two", d.Digest); err != nil {
		t.Errorf("the other repository's manifest after removal from the first: %v", err)
	}
	if err := l.DeleteManifest(ctx, "podcast/two", d.Digest); err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(filepath.Join(l.Dir(), "blobs", "sha256", d.Digest.Hex)); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("the manifest's blob after removal from both repositories: %v", err)
	}
	if dmg := scrubDamage(t, l); len(dmg) != 0 {
		t.Errorf("Scrub: %v", dmg)
	}
}

// TestDeleterThroughWrappers: every wrapper passes Deleter through, and
// the memo does not serve a removed manifest or blob afterwards.
func TestDeleterThroughWrappers(t *testing.T) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	l := openLocal(t)
	cache, err := registry.OpenBlobCache(t.TempDir(), 1<<30)
	if err != nil {
		t.Fatal(err)
	}
	stores := map[string]registry.Store{
		"retry":  registry.NewRetry(l, registry.RetryOptions{}),
		"faulty": registry.NewFaulty(l, registry.FaultPlan{}),
		"memo":   registry.NewMemo(l, 1<<20),
		"cached": registry.NewCached(l, cache),
	}
	for name, s := range stores {
		d, ok := s.(registry.Deleter)
		if !ok {
			t.Errorf("%s: the wrapper hides Deleter", name)
			continue
		}
		if !d.SharesBlobs() {
			t.Errorf("%s: SharesBlobs false for a local store", name)
		}
		a := storetest.NewArtifact(93, "application/vnd.modelgate.encoder.v1", nil, nil)
		desc := storetest.Push(t, s, repo, "", a)
		if _, _, err := s.Manifest(ctx, repo, desc.Digest); err != nil { // the memo keeps it
			t.Fatal(err)
		}
		rc, err := s.Blob(ctx, repo, a.Config.Digest)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := rc.Read(make([]byte, 4096)); err != nil {
			t.Fatal(err)
		}
		rc.Read(make([]byte, 1)) // to the end: the memo keeps it
		rc.Close()
		if err := d.DeleteManifest(ctx, repo, desc.Digest); err != nil {
			t.Fatalf("%s: DeleteManifest: %v", name, err)
		}
		if err := d.DeleteBlob(ctx, repo, a.Config.Digest); err != nil {
			t.Fatalf("%s: DeleteBlob: %v", name, err)
		}
		if _, _, err := s.Manifest(ctx, repo, desc.Digest); !errors.Is(err, registry.ErrNotFound) {
			t.Errorf("%s: Manifest after DeleteManifest: %v, want ErrNotFound", name, err)
		}
		if _, err := s.Blob(ctx, repo, a.Config.Digest); !errors.Is(err, registry.ErrNotFound) {
			t.Errorf("%s: Blob after DeleteBlob: %v, want ErrNotFound", name, err)
		}
	}
}
