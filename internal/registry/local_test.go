package registry_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"strings"
	"syscall"
	"testing"

	"github.com/google/go-cmp/cmp"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

func openLocal(t testing.TB) *registry.Local {
	t.Helper()
	l, err := registry.OpenLocal(filepath.Join(t.TempDir(), "store"))
	if err != nil {
		t.Fatal(err)
	}
	return l
}

func TestLocalConformance(t *testing.T) {
	storetest.Run(t, func(t *testing.T) registry.Store { return openLocal(t) })
}

func readIndexFile(t *testing.T, dir string) v1.IndexManifest {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(dir, "index.json"))
	if err != nil {
		t.Fatal(err)
	}
	var idx v1.IndexManifest
	if err := json.Unmarshal(b, &idx); err != nil {
		t.Fatalf("index.json is not valid JSON: %v", err)
	}
	return idx
}

// TestLocalLayoutFiles checks the files against the OCI image layout
// (image-spec v1.1, image-layout.md): an oci-layout file with
// imageLayoutVersion 1.0.0, index.json an image index, blobs under
// blobs/sha256/<hex>; tags as org.opencontainers.image.ref.name
// (annotations.md).
func TestLocalLayoutFiles(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	const repo = "podcast/listener-encoder"

	b, err := os.ReadFile(filepath.Join(l.Dir(), "oci-layout"))
	if err != nil {
		t.Fatal(err)
	}
	var lf map[string]any
	if err := json.Unmarshal(b, &lf); err != nil || !cmp.Equal(lf, map[string]any{"imageLayoutVersion": "1.0.0"}) {
		t.Errorf("oci-layout = %s, want {\"imageLayoutVersion\":\"1.0.0\"}", b)
	}
	if idx := readIndexFile(t, l.Dir()); idx.SchemaVersion != 2 || idx.MediaType != types.OCIImageIndex || idx.Manifests == nil {
		t.Errorf("empty index.json = %+v", idx)
	}

	model := storetest.NewArtifact(1, "application/vnd.modelgate.encoder.v1", nil, map[string]string{
		"org.opencontainers.image.revision": "4f2a9c1",
		"org.opencontainers.image.ref.name": "not-copied",
	})
	md := storetest.Push(t, l, repo, "prod", model)
	subj := md
	subj.ArtifactType = ""
	report := storetest.NewArtifact(2, "application/vnd.modelgate.report.v1", &subj, nil)
	rd := storetest.Push(t, l, repo, "", report)

	for _, blob := range append([]storetest.Blob{model.Config, model.Manifest, report.Manifest}, model.Layers...) {
		got, err := os.ReadFile(filepath.Join(l.Dir(), "blobs", "sha256", blob.Digest.Hex))
		if err != nil || !bytes.Equal(got, blob.Data) {
			t.Errorf("blobs/sha256/%s: %v", blob.Digest.Hex, err)
		}
	}

	const at = "application/vnd.modelgate.encoder.v1"
	modelEntry := v1.Descriptor{MediaType: types.OCIManifestSchema1, Size: md.Size, Digest: md.Digest, ArtifactType: at, Annotations: map[string]string{
		"dev.modelgate.repository":          repo,
		"org.opencontainers.image.revision": "4f2a9c1",
	}}
	reportEntry := v1.Descriptor{MediaType: types.OCIManifestSchema1, Size: rd.Size, Digest: rd.Digest, ArtifactType: "application/vnd.modelgate.report.v1", Annotations: map[string]string{
		"dev.modelgate.repository": repo,
		"dev.modelgate.subject":    md.Digest.String(),
	}}
	// index.json holds the tag only; the manifests are recorded in side
	// files (see the Local doc comment).
	want := []v1.Descriptor{
		{MediaType: types.OCIManifestSchema1, Size: md.Size, Digest: md.Digest, ArtifactType: at, Annotations: map[string]string{
			"dev.modelgate.repository":          repo,
			"org.opencontainers.image.revision": "4f2a9c1",
			"org.opencontainers.image.ref.name": repo + ":prod",
		}},
	}
	side := ".modelgate/repos/podcast+listener-encoder/"
	wantSide := map[string]v1.Descriptor{
		side + "manifests/" + md.Digest.Hex: modelEntry,
		side + "manifests/" + rd.Digest.Hex: reportEntry,
		side + "referrers/" + md.Digest.Hex + "/application%2Fvnd.modelgate.report.v1/" + rd.Digest.Hex: reportEntry,
	}
	if diff := cmp.Diff(wantSide, readSideFiles(t, l.Dir())); diff != "" {
		t.Errorf("side files (-want +got):\n%s", diff)
	}
	before, err := os.ReadFile(filepath.Join(l.Dir(), "index.json"))
	if err != nil {
		t.Fatal(err)
	}
	if diff := cmp.Diff(want, readIndexFile(t, l.Dir()).Manifests); diff != "" {
		t.Errorf("index.json entries (-want +got):\n%s", diff)
	}

	// Repeating puts and the same tag leaves index.json byte-identical and
	// writes no side file again.
	sideBefore := sideFileStats(t, l.Dir())
	storetest.Push(t, l, repo, "prod", model)
	storetest.Push(t, l, repo, "", report)
	after, err := os.ReadFile(filepath.Join(l.Dir(), "index.json"))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(before, after) {
		t.Errorf("index.json changed on repeated puts:\n%s\n---\n%s", before, after)
	}
	if diff := cmp.Diff(sideBefore, sideFileStats(t, l.Dir())); diff != "" {
		t.Errorf("side files rewritten on repeated puts (-before +after):\n%s", diff)
	}

	// Retagging replaces the tag entry: still one entry per ref.name.
	other := storetest.Push(t, l, repo, "", storetest.NewArtifact(3, at, nil, nil))
	if err := l.Tag(ctx, repo, "prod", other); err != nil {
		t.Fatal(err)
	}
	refs := map[string]int{}
	for _, d := range readIndexFile(t, l.Dir()).Manifests {
		if r := d.Annotations["org.opencontainers.image.ref.name"]; r != "" {
			refs[r]++
			if d.Digest != other.Digest {
				t.Errorf("tag entry %s points at %s, want %s", r, d.Digest, other.Digest)
			}
		}
	}
	if !cmp.Equal(refs, map[string]int{repo + ":prod": 1}) {
		t.Errorf("ref.name entries = %v, want one for %s:prod", refs, repo)
	}
	// The referrer descriptor carries the manifest's annotations but not
	// the store's bookkeeping or ref.name.
	ds, err := l.Manifests(ctx, repo)
	if err != nil {
		t.Fatal(err)
	}
	for _, d := range ds {
		if d.Digest == md.Digest && !cmp.Equal(d.Annotations, map[string]string{"org.opencontainers.image.revision": "4f2a9c1"}) {
			t.Errorf("Manifests descriptor annotations = %v", d.Annotations)
		}
	}
	if l.String() != "oci:"+l.Dir() {
		t.Errorf("String() = %q", l.String())
	}
}

// readSideFiles returns every file under DIR/.modelgate/repos, by path
// relative to DIR, decoded as a descriptor.
func readSideFiles(t *testing.T, dir string) map[string]v1.Descriptor {
	t.Helper()
	out := map[string]v1.Descriptor{}
	root := filepath.Join(dir, ".modelgate", "repos")
	err := filepath.WalkDir(root, func(p string, e fs.DirEntry, err error) error {
		if err != nil || e.IsDir() {
			return err
		}
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		var d v1.Descriptor
		if err := json.Unmarshal(b, &d); err != nil {
			return fmt.Errorf("%s: %w", p, err)
		}
		rel, _ := filepath.Rel(dir, p)
		out[filepath.ToSlash(rel)] = d
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// sideFileStats returns the inode and modification time of every file
// under DIR/.modelgate/repos: a rewrite shows as a change.
func sideFileStats(t *testing.T, dir string) map[string]string {
	t.Helper()
	out := map[string]string{}
	root := filepath.Join(dir, ".modelgate", "repos")
	err := filepath.WalkDir(root, func(p string, e fs.DirEntry, err error) error {
		if err != nil || e.IsDir() {
			return err
		}
		fi, err := os.Stat(p)
		if err != nil {
			return err
		}
		// The inode, not the time: a repeated put refreshes a side file's
		// time (Refresher) without writing the file again.
		out[p] = fmt.Sprintf("inode %d", fi.Sys().(*syscall.Stat_t).Ino)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

func TestLocalUntag(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	const repo = "podcast/promo-scorer"
	d := storetest.Push(t, l, repo, "canary", storetest.NewArtifact(5, "application/vnd.modelgate.scorer.v1", nil, nil))
	if err := l.Untag(ctx, repo, "canary"); err != nil {
		t.Fatal(err)
	}
	if _, err := l.Resolve(ctx, repo, "canary"); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("Resolve after Untag: %v, want ErrNotFound", err)
	}
	if _, _, err := l.Manifest(ctx, repo, d.Digest); err != nil {
		t.Errorf("manifest gone after Untag: %v", err)
	}
	if tags, err := l.Tags(ctx, repo); err != nil || len(tags) != 0 {
		t.Errorf("Tags after Untag = %q, %v", tags, err)
	}
	if err := l.Untag(ctx, repo, "canary"); !errors.Is(err, registry.ErrNotFound) || errkind.Of(err) != errkind.BadInput {
		t.Errorf("second Untag: %v, want ErrNotFound of kind bad input", err)
	}
	if err := l.Untag(ctx, repo, "-bad"); errkind.Of(err) != errkind.BadInput {
		t.Errorf("Untag of an invalid tag: %v", err)
	}
}

func TestLocalManifestScopedToRepository(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	a := storetest.NewArtifact(6, "application/vnd.modelgate.encoder.v1", nil, nil)
	storetest.Push(t, l, "podcast/shows", "prod", a)
	_, _, err := l.Manifest(ctx, "podcast/episodes-played", a.Manifest.Digest)
	if !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("Manifest from another repository: %v, want ErrNotFound", err)
	}
	// Putting the same manifest there records it (blobs are shared).
	if _, err := l.PutManifest(ctx, "podcast/episodes-played", "", a.Manifest.Data); err != nil {
		t.Fatal(err)
	}
	if _, _, err := l.Manifest(ctx, "podcast/episodes-played", a.Manifest.Digest); err != nil {
		t.Errorf("Manifest after put into the second repository: %v", err)
	}
	if _, err := l.PutManifest(ctx, "podcast/shows", types.OCIImageIndex, a.Manifest.Data); errkind.Of(err) != errkind.BadInput {
		t.Errorf("PutManifest under the wrong media type: %v, want bad input", err)
	}
}

func TestLocalForeignEntriesKept(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	a := storetest.NewArtifact(7, "application/vnd.modelgate.encoder.v1", nil, nil)
	d := storetest.Push(t, l, "podcast/shows", "", a)

	// An entry as another OCI tool would write it: ref.name only.
	idx := readIndexFile(t, l.Dir())
	foreign := v1.Descriptor{MediaType: d.MediaType, Size: d.Size, Digest: d.Digest,
		Annotations: map[string]string{"org.opencontainers.image.ref.name": "latest"}}
	idx.Manifests = append(idx.Manifests, foreign)
	raw, _ := json.Marshal(idx)
	if err := os.WriteFile(filepath.Join(l.Dir(), "index.json"), raw, 0o644); err != nil {
		t.Fatal(err)
	}
	if err := l.Tag(ctx, "podcast/shows", "prod", d); err != nil {
		t.Fatal(err)
	}
	got := readIndexFile(t, l.Dir()).Manifests
	if !slices.ContainsFunc(got, func(x v1.Descriptor) bool { return cmp.Equal(x, foreign) }) {
		t.Errorf("foreign entry lost: %+v", got)
	}
	if repos, err := l.Repositories(ctx); err != nil || !slices.Equal(repos, []string{"podcast/shows"}) {
		t.Errorf("Repositories = %q, %v", repos, err)
	}
}

func TestLocalReopen(t *testing.T) {
	ctx := context.Background()
	dir := filepath.Join(t.TempDir(), "store")
	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	d := storetest.Push(t, l, "podcast/shows", "prod", storetest.NewArtifact(8, "application/vnd.modelgate.encoder.v1", nil, nil))
	l2, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	if got, err := l2.Resolve(ctx, "podcast/shows", "prod"); err != nil || got.Digest != d.Digest {
		t.Errorf("after reopen Resolve = %v, %v", got.Digest, err)
	}

	other := t.TempDir()
	if err := os.WriteFile(filepath.Join(other, "oci-layout"), []byte(`{"imageLayoutVersion":"2.0.0"}`), 0o644); err != nil {
		t.Fatal(err)
	}
	if _, err := registry.OpenLocal(other); errkind.Of(err) != errkind.BadInput {
		t.Errorf("OpenLocal of a layout version 2.0.0: %v, want bad input", err)
	}
	file := filepath.Join(t.TempDir(), "plain-file")
	if err := os.WriteFile(file, []byte("x"), 0o644); err != nil {
		t.Fatal(err)
	}
	if _, err := registry.OpenLocal(file); err == nil {
		t.Error("OpenLocal of a plain file succeeded")
	}
}

func TestLocalRefusedUploadLeavesNothing(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	b := storetest.NewBlob(9, 3<<20)
	bad := append(slices.Clone(b.Data[:len(b.Data)-1]), b.Data[len(b.Data)-1]^1)
	if err := l.PutBlob(ctx, "podcast/shows", b.Digest, int64(len(bad)), bytes.NewReader(bad)); !errors.Is(err, registry.ErrDigestMismatch) {
		t.Fatalf("PutBlob of wrong bytes: %v", err)
	}
	cctx, cancel := context.WithCancel(ctx)
	cancel()
	if err := l.PutBlob(cctx, "podcast/shows", b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); !errors.Is(err, context.Canceled) {
		t.Errorf("PutBlob with a cancelled context: %v", err)
	}
	if _, err := l.StatBlob(ctx, "podcast/shows", b.Digest); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("StatBlob after refused uploads: %v", err)
	}
	ents, err := os.ReadDir(filepath.Join(l.Dir(), ".modelgate", "tmp"))
	if err != nil || len(ents) != 0 {
		t.Errorf("temporary files left: %v, %v", ents, err)
	}
}

// A present blob of the wrong size is damage; a verified upload replaces it.
func TestLocalUploadReplacesTruncatedBlob(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	b := storetest.NewBlob(10, 50000)
	p := filepath.Join(l.Dir(), "blobs", "sha256", b.Digest.Hex)
	if err := os.WriteFile(p, b.Data[:1000], 0o644); err != nil {
		t.Fatal(err)
	}
	if err := l.PutBlob(ctx, "podcast/shows", b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); err != nil {
		t.Fatal(err)
	}
	got, err := os.ReadFile(p)
	if err != nil || !bytes.Equal(got, b.Data) {
		t.Errorf("truncated blob not replaced: %d bytes, %v", len(got), err)
	}
}

func scrubFindings(t *testing.T, l *registry.Local, referenced map[v1.Hash]bool) []registry.Finding {
	t.Helper()
	fs, err := l.Scrub(context.Background(), referenced)
	if err != nil {
		t.Fatalf("Scrub: %v", err)
	}
	return fs
}

func referencedBy(arts ...storetest.Artifact) map[v1.Hash]bool {
	m := map[v1.Hash]bool{}
	for _, a := range arts {
		m[a.Config.Digest] = true
		for _, b := range a.Layers {
			m[b.Digest] = true
		}
	}
	return m
}

func TestLocalCorruption(t *testing.T) {
	const repo = "podcast/listener-encoder"
	type setup struct {
		l   *registry.Local
		art storetest.Artifact // tagged prod
		rep storetest.Artifact // untagged report with subject art
	}
	blobFile := func(s setup, d v1.Hash) string { return filepath.Join(s.l.Dir(), "blobs", "sha256", d.Hex) }
	side := ".modelgate/repos/podcast+listener-encoder/"
	manifestSide := func(s setup) string { return side + "manifests/" + s.rep.Manifest.Digest.Hex }
	referrerSide := func(s setup) string {
		return side + "referrers/" + s.art.Manifest.Digest.Hex + "/application%2Fvnd.modelgate.report.v1/" + s.rep.Manifest.Digest.Hex
	}
	abs := func(s setup, rel string) string { return filepath.Join(s.l.Dir(), filepath.FromSlash(rel)) }
	cases := []struct {
		name string
		// damage changes the files and returns where Scrub must report
		// findings (in its order) and their severity.
		damage func(t *testing.T, s setup) (where []string, severity string)
		check  func(t *testing.T, s setup) // asserts what reads of the damaged content return
	}{
		{
			name: "flipped byte in a layer",
			damage: func(t *testing.T, s setup) ([]string, string) {
				p := blobFile(s, s.art.Layers[0].Digest)
				b, _ := os.ReadFile(p)
				b[len(b)/2] ^= 0x01
				writeFile(t, p, b)
				return []string{s.art.Layers[0].Digest.String()}, registry.SeverityDamage
			},
			check: func(t *testing.T, s setup) { wantIntegrity(t, readBothWays(s.l, repo, s.art.Layers[0].Digest)...) },
		},
		{
			name: "truncated layer",
			damage: func(t *testing.T, s setup) ([]string, string) {
				p := blobFile(s, s.art.Layers[1].Digest)
				writeFile(t, p, s.art.Layers[1].Data[:10])
				return []string{s.art.Layers[1].Digest.String()}, registry.SeverityDamage
			},
			check: func(t *testing.T, s setup) { wantIntegrity(t, readBothWays(s.l, repo, s.art.Layers[1].Digest)...) },
		},
		{
			name: "corrupt manifest",
			damage: func(t *testing.T, s setup) ([]string, string) {
				p := blobFile(s, s.art.Manifest.Digest)
				b := bytes.Replace(s.art.Manifest.Data, []byte(`"schemaVersion":2`), []byte(`"schemaVersion":3`), 1)
				writeFile(t, p, b)
				return []string{s.art.Manifest.Digest.String()}, registry.SeverityDamage
			},
			check: func(t *testing.T, s setup) {
				_, _, err := s.l.Manifest(context.Background(), repo, s.art.Manifest.Digest)
				wantIntegrity(t, err)
			},
		},
		{
			name: "dangling tag",
			damage: func(t *testing.T, s setup) ([]string, string) {
				if err := os.Remove(blobFile(s, s.art.Manifest.Digest)); err != nil {
					t.Fatal(err)
				}
				// Both the untagged entry and the tag now point at nothing.
				return []string{repo + "@" + s.art.Manifest.Digest.String(), repo + ":prod"}, registry.SeverityDamage
			},
			check: func(t *testing.T, s setup) {
				_, _, err := s.l.Manifest(context.Background(), repo, s.art.Manifest.Digest)
				if !errors.Is(err, registry.ErrNotFound) || errkind.Of(err) != errkind.Integrity {
					t.Errorf("Manifest of a dangling entry: %v, want ErrNotFound of kind integrity", err)
				}
			},
		},
		{
			name: "untagged manifest blob missing",
			damage: func(t *testing.T, s setup) ([]string, string) {
				if err := os.Remove(blobFile(s, s.rep.Manifest.Digest)); err != nil {
					t.Fatal(err)
				}
				return []string{repo + "@" + s.rep.Manifest.Digest.String()}, registry.SeverityDamage
			},
			check: func(t *testing.T, s setup) {
				_, _, err := s.l.Manifest(context.Background(), repo, s.rep.Manifest.Digest)
				if !errors.Is(err, registry.ErrNotFound) || errkind.Of(err) != errkind.Integrity {
					t.Errorf("Manifest whose blob is missing: %v, want ErrNotFound of kind integrity", err)
				}
			},
		},
		{
			name: "torn side file",
			damage: func(t *testing.T, s setup) ([]string, string) {
				writeFile(t, abs(s, manifestSide(s)), []byte(`{"mediaType":`))
				return []string{manifestSide(s)}, registry.SeverityDamage
			},
			check: func(t *testing.T, s setup) {
				_, err := s.l.Manifests(context.Background(), repo)
				if errkind.Of(err) != errkind.Integrity {
					t.Errorf("Manifests with a torn side file: %v, want integrity", err)
				}
				_, _, err = s.l.Manifest(context.Background(), repo, s.rep.Manifest.Digest)
				if errkind.Of(err) != errkind.Integrity {
					t.Errorf("Manifest with a torn side file: %v, want integrity", err)
				}
			},
		},
		{
			name: "side file of another manifest",
			damage: func(t *testing.T, s setup) ([]string, string) {
				b, err := os.ReadFile(abs(s, side+"manifests/"+s.art.Manifest.Digest.Hex))
				if err != nil {
					t.Fatal(err)
				}
				writeFile(t, abs(s, referrerSide(s)), b)
				return []string{referrerSide(s)}, registry.SeverityDamage
			},
			check: func(t *testing.T, s setup) {
				_, err := s.l.Referrers(context.Background(), repo, s.art.Manifest.Digest, "")
				if errkind.Of(err) != errkind.Integrity {
					t.Errorf("Referrers with a misnamed side file: %v, want integrity", err)
				}
			},
		},
		{
			name: "side file with other annotations",
			damage: func(t *testing.T, s setup) ([]string, string) {
				p := abs(s, manifestSide(s))
				b, err := os.ReadFile(p)
				if err != nil {
					t.Fatal(err)
				}
				writeFile(t, p, bytes.Replace(b, []byte(`"annotations":{`), []byte(`"annotations":{"dev.modelgate.approved-by":"nobody",`), 1))
				return []string{manifestSide(s)}, registry.SeverityDamage
			},
		},
		{
			name: "referrer side file without manifest side file",
			damage: func(t *testing.T, s setup) ([]string, string) {
				if err := os.Remove(abs(s, manifestSide(s))); err != nil {
					t.Fatal(err)
				}
				return []string{referrerSide(s)}, registry.SeverityDamage
			},
		},
		{
			name: "manifest side file without referrer side file",
			damage: func(t *testing.T, s setup) ([]string, string) {
				if err := os.Remove(abs(s, referrerSide(s))); err != nil {
					t.Fatal(err)
				}
				return []string{repo + "@" + s.rep.Manifest.Digest.String()}, registry.SeverityHint
			},
			check: func(t *testing.T, s setup) {
				// Putting the manifest again completes its record.
				ctx := context.Background()
				if ds, err := s.l.Referrers(ctx, repo, s.art.Manifest.Digest, ""); err != nil || len(ds) != 0 {
					t.Errorf("Referrers without the referrer side file = %v, %v", ds, err)
				}
				storetest.Push(t, s.l, repo, "", s.rep)
				if ds, err := s.l.Referrers(ctx, repo, s.art.Manifest.Digest, ""); err != nil || len(ds) != 1 {
					t.Errorf("Referrers after putting the manifest again = %v, %v", ds, err)
				}
				if err := os.Remove(abs(s, referrerSide(s))); err != nil {
					t.Fatal(err)
				}
			},
		},
		{
			name: "unexpected file among side files",
			damage: func(t *testing.T, s setup) ([]string, string) {
				writeFile(t, abs(s, side+"notes.txt"), []byte("listener survey"))
				return []string{side + "notes.txt"}, registry.SeverityHint
			},
		},
		{
			name: "leftover temp file",
			damage: func(t *testing.T, s setup) ([]string, string) {
				writeFile(t, filepath.Join(s.l.Dir(), ".modelgate", "tmp", "blob-123456"), []byte("half a blob"))
				return []string{".modelgate/tmp/blob-123456"}, registry.SeverityHint
			},
		},
		{
			name: "unreferenced blob",
			damage: func(t *testing.T, s setup) ([]string, string) {
				b := storetest.NewBlob(77, 100)
				if err := s.l.PutBlob(context.Background(), repo, b.Digest, 100, bytes.NewReader(b.Data)); err != nil {
					t.Fatal(err)
				}
				return []string{b.Digest.String()}, registry.SeverityHint
			},
		},
	}
	for _, c := range cases {
		t.Run(strings.ReplaceAll(c.name, " ", "_"), func(t *testing.T) {
			l := openLocal(t)
			s := setup{l: l, art: storetest.NewArtifact(11, "application/vnd.modelgate.encoder.v1", nil, nil)}
			subj := s.art.Descriptor()
			s.rep = storetest.NewArtifact(13, "application/vnd.modelgate.report.v1", &subj, nil)
			storetest.Push(t, l, repo, "prod", s.art)
			storetest.Push(t, l, repo, "", s.rep)
			referenced := referencedBy(s.art, s.rep)
			if fs := scrubFindings(t, l, referenced); len(fs) != 0 {
				t.Fatalf("clean store: Scrub found %+v", fs)
			}

			where, severity := c.damage(t, s)
			if c.check != nil {
				c.check(t, s)
			}
			fs := scrubFindings(t, l, referenced)
			var got []string
			for _, f := range fs {
				got = append(got, f.Where)
				if f.Severity != severity {
					t.Errorf("finding %+v: want severity %s", f, severity)
				}
			}
			if !slices.Equal(got, where) {
				t.Errorf("Scrub = %+v, want findings at %q", fs, where)
			}
		})
	}
}

func writeFile(t *testing.T, p string, b []byte) {
	t.Helper()
	if err := os.WriteFile(p, b, 0o644); err != nil {
		t.Fatal(err)
	}
}

// readBothWays reads a blob to the end through WriteTo (io.Copy) and
// through small Reads, and returns the error each path ended with.
func readBothWays(l *registry.Local, repo string, d v1.Hash) []error {
	var errs []error
	rc, err := l.Blob(context.Background(), repo, d)
	if err != nil {
		return []error{err}
	}
	_, err = io.Copy(io.Discard, rc)
	rc.Close()
	errs = append(errs, err)

	rc, err = l.Blob(context.Background(), repo, d)
	if err != nil {
		return append(errs, err)
	}
	defer rc.Close()
	buf := make([]byte, 7)
	for err == nil {
		_, err = rc.Read(buf)
	}
	if err == io.EOF {
		err = nil
	}
	return append(errs, err)
}

func wantIntegrity(t *testing.T, errs ...error) {
	t.Helper()
	for i, err := range errs {
		if !errors.Is(err, registry.ErrDigestMismatch) || errkind.Of(err) != errkind.Integrity {
			t.Errorf("read %d of damaged content: %v, want ErrDigestMismatch of kind integrity", i, err)
		}
	}
}

func TestLocalCorruptIndex(t *testing.T) {
	l := openLocal(t)
	writeFile(t, filepath.Join(l.Dir(), "index.json"), []byte(`{"schemaVersion":2,"manifests":[`))
	if _, err := l.Repositories(context.Background()); errkind.Of(err) != errkind.Integrity {
		t.Errorf("Repositories with a torn index.json: %v, want integrity", err)
	}
	fs := scrubFindings(t, l, nil)
	if len(fs) != 1 || fs[0].Where != "index.json" || fs[0].Severity != registry.SeverityDamage {
		t.Errorf("Scrub = %+v, want damage at index.json", fs)
	}
}

// FuzzLocalPutManifest: any bytes given as a manifest are refused with bad
// input or accepted and read back unchanged; nothing panics.
func FuzzLocalPutManifest(f *testing.F) {
	a := storetest.NewArtifact(12, "application/vnd.modelgate.encoder.v1", nil, nil)
	f.Add(a.Manifest.Data)
	f.Add([]byte(`{"schemaVersion":2,"mediaType":"application/vnd.oci.image.index.v1+json","manifests":[]}`))
	f.Add([]byte(`{"schemaVersion":2,"config":{"digest":"sha256:../../x"}}`))
	f.Add([]byte(`{"schemaVersion":2,"mediaType":"application/vnd.oci.image.manifest.v1+json","config":{"mediaType":"x","size":1,"digest":"sha256:` + strings.Repeat("0", 64) + `"}}`))
	f.Add([]byte(`null`))
	l := openLocal(f)
	storetest.PushBlobs(f, l, "podcast/shows", a)
	f.Fuzz(func(t *testing.T, raw []byte) {
		ctx := context.Background()
		d, err := l.PutManifest(ctx, "podcast/shows", "", raw)
		if err != nil {
			if errkind.Of(err) != errkind.BadInput {
				t.Fatalf("PutManifest error of kind %v: %v", errkind.Of(err), err)
			}
			return
		}
		got, _, err := l.Manifest(ctx, "podcast/shows", d.Digest)
		if err != nil || !bytes.Equal(got, raw) {
			t.Fatalf("accepted manifest reads back as %q, %v", got, err)
		}
	})
}

// TestLocalIndexHoldsOnlyTags pushes referrers of several types, untagged
// models and release-style tag moves: index.json keeps one entry per tag
// and nothing else, while Referrers and Manifests still find everything.
func TestLocalIndexHoldsOnlyTags(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	const repo = "podcast/promo-scorer"
	model := storetest.Push(t, l, repo, "prod", storetest.NewArtifact(300, "application/vnd.modelgate.scorer.v1", nil, nil))
	cand := storetest.Push(t, l, repo, "candidate", storetest.NewArtifact(301, "application/vnd.modelgate.scorer.v1", nil, nil))
	subj := model
	subj.ArtifactType = ""
	types := []string{"application/vnd.modelgate.report.v1", "application/vnd.modelgate.approval.v1", "application/vnd.modelgate.release.v1"}
	want := map[string][]string{}
	var all []string
	for i := range 30 {
		at := types[i%len(types)]
		d := storetest.Push(t, l, repo, "", storetest.NewArtifact(uint64(310+i), at, &subj, map[string]string{"dev.modelgate.seq": fmt.Sprint(i)}))
		want[at] = append(want[at], d.Digest.String())
		all = append(all, d.Digest.String())
		if at == types[2] { // a release record moves the head pointer
			if err := storetest.ForceTag(ctx, l, repo, "release-prod", d); err != nil {
				t.Fatal(err)
			}
		}
	}
	for i := range 5 {
		storetest.Push(t, l, repo, "", storetest.NewArtifact(uint64(350+i), "application/vnd.modelgate.scorer.v1", nil, nil))
	}
	if err := l.SwapTag(ctx, repo, "prod", model.Digest, cand); err != nil {
		t.Fatal(err)
	}

	idx := readIndexFile(t, l.Dir())
	var refs []string
	for _, d := range idx.Manifests {
		r := d.Annotations["org.opencontainers.image.ref.name"]
		if r == "" {
			t.Errorf("index.json entry without a tag: %+v", d)
		}
		refs = append(refs, r)
	}
	slices.Sort(refs)
	if wantRefs := []string{repo + ":candidate", repo + ":prod", repo + ":release-prod"}; !slices.Equal(refs, wantRefs) {
		t.Errorf("index.json tags = %q, want %q", refs, wantRefs)
	}

	for at, ds := range want {
		got, err := l.Referrers(ctx, repo, model.Digest, at)
		slices.Sort(ds)
		if err != nil || !slices.Equal(digestStrings(got), ds) {
			t.Errorf("Referrers(%s) = %q, %v; want %q", at, digestStrings(got), err, ds)
		}
	}
	got, err := l.Referrers(ctx, repo, model.Digest, "")
	slices.Sort(all)
	if err != nil || !slices.Equal(digestStrings(got), all) {
		t.Errorf("Referrers(all) = %d descriptors, %v; want %d", len(got), err, len(all))
	}
	if ms, err := l.Manifests(ctx, repo); err != nil || len(ms) != 2+30+5 {
		t.Errorf("Manifests = %d descriptors, %v; want %d", len(ms), err, 2+30+5)
	}
}

func digestStrings(ds []v1.Descriptor) []string {
	out := []string{}
	for _, d := range ds {
		out = append(out, d.Digest.String())
	}
	return out
}

// TestLocalSeesOtherWriters: a Local keeps index.json parsed between
// calls; it must still see every change another Local (another process)
// makes, also many swaps between two targets of the same size in a row
// (the new index.json then has the old one's size and possibly the same
// modification time), and a rewrite in place by another tool.
func TestLocalSeesOtherWriters(t *testing.T) {
	ctx := context.Background()
	l1 := openLocal(t)
	l2, err := registry.OpenLocal(l1.Dir())
	if err != nil {
		t.Fatal(err)
	}
	const repo = "podcast/shows"
	x := storetest.Push(t, l1, repo, "prod", storetest.NewArtifact(400, "application/vnd.modelgate.encoder.v1", nil, nil))
	y := storetest.Push(t, l1, repo, "", storetest.NewArtifact(401, "application/vnd.modelgate.encoder.v1", nil, nil))
	if x.Size != y.Size {
		t.Fatalf("test artifacts differ in size (%d, %d); the test needs equal sizes", x.Size, y.Size)
	}
	cur := x
	for i := range 200 {
		next := y
		if cur.Digest == y.Digest {
			next = x
		}
		if err := l2.SwapTag(ctx, repo, "prod", cur.Digest, next); err != nil {
			t.Fatalf("swap %d: %v", i, err)
		}
		if got, err := l1.Resolve(ctx, repo, "prod"); err != nil || got.Digest != next.Digest {
			t.Fatalf("swap %d: the other Local resolves prod to %v, %v; want %s", i, got.Digest, err, next.Digest)
		}
		cur = next
	}

	// Another tool rewrites index.json in place (not by rename), adding an
	// entry of its own.
	idx := readIndexFile(t, l1.Dir())
	idx.Manifests = append(idx.Manifests, v1.Descriptor{MediaType: x.MediaType, Size: x.Size, Digest: x.Digest,
		Annotations: map[string]string{"dev.modelgate.repository": "podcast/episodes-played", "org.opencontainers.image.ref.name": "podcast/episodes-played:latest"}})
	raw, _ := json.Marshal(idx)
	f, err := os.OpenFile(filepath.Join(l1.Dir(), "index.json"), os.O_WRONLY|os.O_TRUNC, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.Write(raw); err != nil {
		t.Fatal(err)
	}
	f.Close()
	if got, err := l1.Resolve(ctx, "podcast/episodes-played", "latest"); err != nil || got.Digest != x.Digest {
		t.Errorf("after an in-place rewrite Resolve = %v, %v", got.Digest, err)
	}
}

// TestLocalStagingLeavesNoTemporaryFiles: a discarded stage, a refused one
// and a committed one leave .modelgate/tmp empty.
func TestLocalStagingLeavesNoTemporaryFiles(t *testing.T) {
	l := openLocal(t)
	ctx := context.Background()
	sb, err := l.StageBlob(ctx, "shows", 5, strings.NewReader("hello"))
	if err != nil {
		t.Fatal(err)
	}
	if n := countTemps(t, l); n != 1 {
		t.Errorf("%d temporary files while staged, want 1", n)
	}
	if err := sb.Discard(); err != nil {
		t.Fatal(err)
	}
	if _, err := l.StageBlob(ctx, "shows", 6, strings.NewReader("hello")); err == nil {
		t.Fatal("short stage accepted")
	}
	sb, err = l.StageBlob(ctx, "shows", 5, strings.NewReader("world"))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := sb.Commit(ctx); err != nil {
		t.Fatal(err)
	}
	if n := countTemps(t, l); n != 0 {
		t.Errorf("%d temporary files left, want 0", n)
	}
	findings, err := l.Scrub(ctx, map[v1.Hash]bool{sb.Digest(): true})
	if err != nil || len(findings) != 0 {
		t.Errorf("Scrub = %v, %v; want no findings", findings, err)
	}
}

func countTemps(t *testing.T, l *registry.Local) int {
	t.Helper()
	es, err := os.ReadDir(filepath.Join(l.Dir(), ".modelgate", "tmp"))
	if err != nil {
		t.Fatal(err)
	}
	return len(es)
}

// TestLocalSmallBlobReadIsSmall: reading a small blob whole (io.Copy,
// which takes WriteTo) allocates about the blob's size, not the large
// buffers of the two-core copy: model loading counts these bytes in its
// load-memory budget.
func TestLocalSmallBlobReadIsSmall(t *testing.T) {
	l := openLocal(t)
	ctx := context.Background()
	b := storetest.NewBlob(5, 2000)
	if err := l.PutBlob(ctx, "shows", b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); err != nil {
		t.Fatal(err)
	}
	read := func() {
		rc, err := l.Blob(ctx, "shows", b.Digest)
		if err != nil {
			t.Fatal(err)
		}
		var out bytes.Buffer
		out.Grow(4096)
		if _, err := io.Copy(&out, rc); err != nil || !bytes.Equal(out.Bytes(), b.Data) {
			t.Fatalf("read back: %v", err)
		}
		rc.Close()
	}
	read()
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	const runs = 20
	for range runs {
		read()
	}
	runtime.ReadMemStats(&after)
	if per := (after.TotalAlloc - before.TotalAlloc) / runs; per > 64<<10 {
		t.Errorf("reading a 2000-byte blob allocates %d bytes", per)
	}
}

// TestLocalScrubBesidePush: a manifest put while Scrub runs — after it
// listed the blobs, before it read the side files — is not damage: its
// blob was written before its side file. (verify beside a push reported
// "names manifest … but its blob is missing", exit 5, before.)
func TestLocalScrubBesidePush(t *testing.T) {
	ctx := context.Background()
	l := openLocal(t)
	a := storetest.NewArtifact(7, "application/vnd.modelgate.encoder.v1", nil, nil)
	storetest.Push(t, l, "podcast/shows", "v1", a)
	b := storetest.NewArtifact(8, "application/vnd.modelgate.encoder.v1", nil, nil)
	registry.SetScrubListedHook(func() {
		registry.SetScrubListedHook(nil)
		for _, blob := range append([]storetest.Blob{b.Config}, b.Layers...) {
			if err := l.PutBlob(ctx, "podcast/shows", blob.Digest, int64(len(blob.Data)), bytes.NewReader(blob.Data)); err != nil {
				t.Error(err)
			}
		}
		if _, err := l.PutManifest(ctx, "podcast/shows", "", b.Manifest.Data); err != nil {
			t.Error(err)
		}
	})
	defer registry.SetScrubListedHook(nil)
	for _, f := range scrubFindings(t, l, referencedBy(a)) {
		if f.Severity == registry.SeverityDamage {
			t.Errorf("damage reported for a manifest put during the scrub: %s: %s", f.Where, f.Message)
		}
	}
	// The next scrub sees it whole.
	for _, f := range scrubFindings(t, l, referencedBy(a, b)) {
		if f.Severity == registry.SeverityDamage {
			t.Errorf("damage after: %s: %s", f.Where, f.Message)
		}
	}
}
