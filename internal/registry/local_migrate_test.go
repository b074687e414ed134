package registry_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"github.com/google/go-cmp/cmp"
	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// oldIndex is index.json as the local store wrote it before side files
// existed (one untagged entry per manifest, one entry per tag), for the
// artifacts of oldArtifacts pushed in this order: encoder a tagged prod
// and v1, report r and approval p with subject a, scorer s tagged canary
// in another repository, and untagged u and g in a third. Its last entry
// was added by hand as another OCI tool (skopeo) writes one: ref.name
// only, no repository.
const oldIndex = `{
  "schemaVersion": 2,
  "mediaType": "application/vnd.oci.image.index.v1+json",
  "manifests": [
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 678,
      "digest": "sha256:b65eb653ef1ee39e8704755329fd017db6e26ca10dd41c73f304750216c52933",
      "annotations": {
        "dev.modelgate.repository": "podcast/listener-encoder",
        "org.opencontainers.image.revision": "4f2a9c1"
      },
      "artifactType": "application/vnd.modelgate.encoder.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 678,
      "digest": "sha256:b65eb653ef1ee39e8704755329fd017db6e26ca10dd41c73f304750216c52933",
      "annotations": {
        "dev.modelgate.repository": "podcast/listener-encoder",
        "org.opencontainers.image.ref.name": "podcast/listener-encoder:prod",
        "org.opencontainers.image.revision": "4f2a9c1"
      },
      "artifactType": "application/vnd.modelgate.encoder.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 678,
      "digest": "sha256:b65eb653ef1ee39e8704755329fd017db6e26ca10dd41c73f304750216c52933",
      "annotations": {
        "dev.modelgate.repository": "podcast/listener-encoder",
        "org.opencontainers.image.ref.name": "podcast/listener-encoder:v1",
        "org.opencontainers.image.revision": "4f2a9c1"
      },
      "artifactType": "application/vnd.modelgate.encoder.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 852,
      "digest": "sha256:4800d54fd118dead9ddad801ed494b9b59a4126463b30a4b65bbc4a56d029626",
      "annotations": {
        "dev.modelgate.repository": "podcast/listener-encoder",
        "dev.modelgate.subject": "sha256:b65eb653ef1ee39e8704755329fd017db6e26ca10dd41c73f304750216c52933",
        "org.opencontainers.image.created": "2026-03-01T09:00:00Z"
      },
      "artifactType": "application/vnd.modelgate.report.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 780,
      "digest": "sha256:5ed26bca6cbfc9eb256c04601d46fe964e97e8c06fc1430ec22116286f0f91cd",
      "annotations": {
        "dev.modelgate.repository": "podcast/listener-encoder",
        "dev.modelgate.subject": "sha256:b65eb653ef1ee39e8704755329fd017db6e26ca10dd41c73f304750216c52933"
      },
      "artifactType": "application/vnd.modelgate.approval.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 615,
      "digest": "sha256:fd3c505e396f3328a45b7f34802bbb6491e4f28a7c9542b6addabc2edf50121f",
      "annotations": {
        "dev.modelgate.repository": "podcast/promo-scorer"
      },
      "artifactType": "application/vnd.modelgate.scorer.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 615,
      "digest": "sha256:fd3c505e396f3328a45b7f34802bbb6491e4f28a7c9542b6addabc2edf50121f",
      "annotations": {
        "dev.modelgate.repository": "podcast/promo-scorer",
        "org.opencontainers.image.ref.name": "podcast/promo-scorer:canary"
      },
      "artifactType": "application/vnd.modelgate.scorer.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 616,
      "digest": "sha256:abd72bf7357b2252af567cf1fdd8c27d69ffa44b27b10b07da5afa7690dcca5e",
      "annotations": {
        "dev.modelgate.repository": "podcast/shows"
      },
      "artifactType": "application/vnd.modelgate.encoder.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 616,
      "digest": "sha256:0dd2b2303e86de25a119f810e57f5183e9c03e384a7a7c9b8429db37c670dd7c",
      "annotations": {
        "dev.modelgate.repository": "podcast/shows"
      },
      "artifactType": "application/vnd.modelgate.encoder.v1"
    },
    {
      "mediaType": "application/vnd.oci.image.manifest.v1+json",
      "size": 678,
      "digest": "sha256:b65eb653ef1ee39e8704755329fd017db6e26ca10dd41c73f304750216c52933",
      "annotations": {
        "org.opencontainers.image.ref.name": "latest"
      }
    }
  ]
}
`

const (
	oldEncoders = "podcast/listener-encoder"
	oldScorers  = "podcast/promo-scorer"
	oldShows    = "podcast/shows"
)

// oldArtifacts returns the artifacts oldIndex records (deterministic:
// storetest builds them from fixed seeds).
func oldArtifacts() (a, r, p, s, u, g storetest.Artifact) {
	a = storetest.NewArtifact(1, "application/vnd.modelgate.encoder.v1", nil, map[string]string{"org.opencontainers.image.revision": "4f2a9c1"})
	subj := a.Descriptor()
	r = storetest.NewArtifact(2, "application/vnd.modelgate.report.v1", &subj, map[string]string{"org.opencontainers.image.created": "2026-03-01T09:00:00Z"})
	p = storetest.NewArtifact(3, "application/vnd.modelgate.approval.v1", &subj, nil)
	s = storetest.NewArtifact(4, "application/vnd.modelgate.scorer.v1", nil, nil)
	u = storetest.NewArtifact(5, "application/vnd.modelgate.encoder.v1", nil, nil)
	g = storetest.NewArtifact(6, "application/vnd.modelgate.encoder.v1", nil, nil)
	return
}

// writeOldStore lays out a store as the earlier version left it: the
// blobs of oldArtifacts and oldIndex, except the manifest blob of g
// (damage an old store may have: an entry whose blob is gone).
func writeOldStore(t *testing.T, dir string) {
	t.Helper()
	blobs := filepath.Join(dir, "blobs", "sha256")
	if err := os.MkdirAll(blobs, 0o755); err != nil {
		t.Fatal(err)
	}
	writeFile(t, filepath.Join(dir, "oci-layout"), []byte(`{"imageLayoutVersion":"1.0.0"}`))
	writeFile(t, filepath.Join(dir, "index.json"), []byte(oldIndex))
	a, r, p, s, u, g := oldArtifacts()
	for _, art := range []storetest.Artifact{a, r, p, s, u, g} {
		for _, b := range append([]storetest.Blob{art.Config, art.Manifest}, art.Layers...) {
			if b.Digest == g.Manifest.Digest {
				continue
			}
			writeFile(t, filepath.Join(blobs, b.Digest.Hex), b.Data)
		}
	}
}

func parseIndex(t *testing.T, raw string) []v1.Descriptor {
	t.Helper()
	var idx v1.IndexManifest
	if err := json.Unmarshal([]byte(raw), &idx); err != nil {
		t.Fatal(err)
	}
	return idx.Manifests
}

// TestLocalMigration opens a store written the old way: its untagged
// entries move to side files identical to them, tags and other tools'
// entries stay, an entry whose manifest blob is missing stays (and Scrub
// reports it); every listing answers as before; opening again, also after
// a conversion cut short before index.json was replaced, changes nothing.
func TestLocalMigration(t *testing.T) {
	ctx := context.Background()
	dir := filepath.Join(t.TempDir(), "store")
	writeOldStore(t, dir)
	a, r, p, s, u, g := oldArtifacts()

	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}

	old := parseIndex(t, oldIndex)
	var wantIndex []v1.Descriptor
	untagged := map[v1.Hash]v1.Descriptor{}
	for _, d := range old {
		_, tagged := d.Annotations["org.opencontainers.image.ref.name"]
		if !tagged {
			untagged[d.Digest] = d
		}
		if tagged || d.Digest == g.Manifest.Digest {
			wantIndex = append(wantIndex, d)
		}
	}
	if diff := cmp.Diff(wantIndex, readIndexFile(t, dir).Manifests); diff != "" {
		t.Errorf("index.json after conversion (-want +got):\n%s", diff)
	}
	enc := ".modelgate/repos/podcast+listener-encoder/"
	wantSide := map[string]v1.Descriptor{
		enc + "manifests/" + a.Manifest.Digest.Hex: untagged[a.Manifest.Digest],
		enc + "manifests/" + r.Manifest.Digest.Hex: untagged[r.Manifest.Digest],
		enc + "manifests/" + p.Manifest.Digest.Hex: untagged[p.Manifest.Digest],
		enc + "referrers/" + a.Manifest.Digest.Hex + "/application%2Fvnd.modelgate.report.v1/" + r.Manifest.Digest.Hex:   untagged[r.Manifest.Digest],
		enc + "referrers/" + a.Manifest.Digest.Hex + "/application%2Fvnd.modelgate.approval.v1/" + p.Manifest.Digest.Hex: untagged[p.Manifest.Digest],
		".modelgate/repos/podcast+promo-scorer/manifests/" + s.Manifest.Digest.Hex:                                       untagged[s.Manifest.Digest],
		".modelgate/repos/podcast+shows/manifests/" + u.Manifest.Digest.Hex:                                              untagged[u.Manifest.Digest],
	}
	if diff := cmp.Diff(wantSide, readSideFiles(t, dir)); diff != "" {
		t.Errorf("side files after conversion (-want +got):\n%s", diff)
	}

	// The store answers as the old one did.
	if repos, err := l.Repositories(ctx); err != nil || !slices.Equal(repos, []string{oldEncoders, oldScorers, oldShows}) {
		t.Errorf("Repositories = %q, %v", repos, err)
	}
	for repo, want := range map[string][]string{oldEncoders: {"prod", "v1"}, oldScorers: {"canary"}, oldShows: {}} {
		if tags, err := l.Tags(ctx, repo); err != nil || !slices.Equal(tags, want) {
			t.Errorf("Tags(%s) = %q, %v; want %q", repo, tags, err, want)
		}
	}
	if d, err := l.Resolve(ctx, oldEncoders, "v1"); err != nil || d.Digest != a.Manifest.Digest {
		t.Errorf("Resolve(v1) = %v, %v", d.Digest, err)
	}
	digests := func(ds []v1.Descriptor) []string {
		var out []string
		for _, d := range ds {
			out = append(out, d.Digest.String())
		}
		return out
	}
	sorted := func(as ...storetest.Artifact) []string {
		var out []string
		for _, x := range as {
			out = append(out, x.Manifest.Digest.String())
		}
		slices.Sort(out)
		return out
	}
	if ds, err := l.Manifests(ctx, oldEncoders); err != nil || !slices.Equal(digests(ds), sorted(a, r, p)) {
		t.Errorf("Manifests(%s) = %q, %v", oldEncoders, digests(ds), err)
	}
	if ds, err := l.Manifests(ctx, oldShows); err != nil || !slices.Equal(digests(ds), sorted(u, g)) {
		t.Errorf("Manifests(%s) = %q, %v (the damaged entry stays listed)", oldShows, digests(ds), err)
	}
	refs, err := l.Referrers(ctx, oldEncoders, a.Manifest.Digest, "")
	if err != nil || !slices.Equal(digests(refs), sorted(r, p)) {
		t.Errorf("Referrers = %q, %v", digests(refs), err)
	}
	for _, d := range refs {
		if d.Digest == r.Manifest.Digest && !cmp.Equal(d.Annotations, map[string]string{"org.opencontainers.image.created": "2026-03-01T09:00:00Z"}) {
			t.Errorf("report referrer annotations = %v", d.Annotations)
		}
	}
	if refs, err := l.Referrers(ctx, oldEncoders, a.Manifest.Digest, "application/vnd.modelgate.approval.v1"); err != nil || !slices.Equal(digests(refs), sorted(p)) {
		t.Errorf("Referrers(approval) = %q, %v", digests(refs), err)
	}
	if raw, _, err := l.Manifest(ctx, oldScorers, s.Manifest.Digest); err != nil || !bytes.Equal(raw, s.Manifest.Data) {
		t.Errorf("Manifest of the scorer: %v", err)
	}
	if _, _, err := l.Manifest(ctx, oldShows, g.Manifest.Digest); !errors.Is(err, registry.ErrNotFound) || errkind.Of(err) != errkind.Integrity {
		t.Errorf("Manifest whose blob is missing: %v, want ErrNotFound of kind integrity", err)
	}
	fs := scrubFindings(t, l, referencedBy(a, r, p, s, u, g))
	if len(fs) != 1 || fs[0].Where != oldShows+"@"+g.Manifest.Digest.String() || fs[0].Severity != registry.SeverityDamage {
		t.Errorf("Scrub = %+v, want one damage at the entry whose blob is missing", fs)
	}

	// Opening again changes nothing.
	converted, err := os.ReadFile(filepath.Join(dir, "index.json"))
	if err != nil {
		t.Fatal(err)
	}
	stats := sideFileStats(t, dir)
	if _, err := registry.OpenLocal(dir); err != nil {
		t.Fatal(err)
	}
	if got, _ := os.ReadFile(filepath.Join(dir, "index.json")); !bytes.Equal(got, converted) {
		t.Errorf("index.json changed on a second open:\n%s", got)
	}
	if diff := cmp.Diff(stats, sideFileStats(t, dir)); diff != "" {
		t.Errorf("side files changed on a second open (-before +after):\n%s", diff)
	}

	// A conversion cut short after the side files were written but before
	// index.json was replaced is finished by the next open.
	writeFile(t, filepath.Join(dir, "index.json"), []byte(oldIndex))
	l2, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	if got, _ := os.ReadFile(filepath.Join(dir, "index.json")); !bytes.Equal(got, converted) {
		t.Errorf("index.json after the interrupted conversion is finished:\n%s\nwant\n%s", got, converted)
	}
	if diff := cmp.Diff(stats, sideFileStats(t, dir)); diff != "" {
		t.Errorf("side files rewritten when finishing the conversion (-before +after):\n%s", diff)
	}
	if tags, err := l2.Tags(ctx, oldEncoders); err != nil || !slices.Equal(tags, []string{"prod", "v1"}) {
		t.Errorf("Tags after finishing = %q, %v", tags, err)
	}
}

// FuzzLocalSideFile: whatever bytes a side file holds, the calls that read
// it return a valid answer or an integrity error, and Scrub reports
// damage unless the bytes are a valid record of that manifest; nothing
// panics.
func FuzzLocalSideFile(f *testing.F) {
	ctx := context.Background()
	l := openLocal(f)
	model := storetest.NewArtifact(800, "application/vnd.modelgate.scorer.v1", nil, nil)
	md := storetest.Push(f, l, oldScorers, "prod", model)
	subj := md
	subj.ArtifactType = ""
	rep := storetest.NewArtifact(801, "application/vnd.modelgate.report.v1", &subj, nil)
	storetest.Push(f, l, oldScorers, "", rep)
	side := filepath.Join(l.Dir(), ".modelgate", "repos", "podcast+promo-scorer")
	files := []string{
		filepath.Join(side, "manifests", rep.Manifest.Digest.Hex),
		filepath.Join(side, "referrers", md.Digest.Hex, "application%2Fvnd.modelgate.report.v1", rep.Manifest.Digest.Hex),
	}
	valid, err := os.ReadFile(files[0])
	if err != nil {
		f.Fatal(err)
	}
	var validDesc v1.Descriptor
	if err := json.Unmarshal(valid, &validDesc); err != nil {
		f.Fatal(err)
	}
	f.Add(valid)
	f.Add(append([]byte("  "), valid...))
	f.Add(bytes.Replace(valid, []byte(`"dev.modelgate.repository"`), []byte(`"dev.modelgate.extra":"x","dev.modelgate.repository"`), 1))
	f.Add([]byte(`{}`))
	f.Add([]byte(`{"mediaType":"application/vnd.oci.image.manifest.v1+json","size":-1,"digest":"sha256:` + rep.Manifest.Digest.Hex + `"}`))
	f.Add([]byte(`null`))
	f.Add(bytes.Replace(valid, []byte("podcast/promo-scorer"), []byte("podcast/shows"), 1))
	referenced := referencedBy(model, rep)
	f.Fuzz(func(t *testing.T, data []byte) {
		for _, p := range files {
			writeFile(t, p, data)
		}
		ok := func(what string, err error) {
			t.Helper()
			if err != nil && errkind.Of(err) != errkind.Integrity {
				t.Fatalf("%s: error of kind %v: %v", what, errkind.Of(err), err)
			}
		}
		_, err := l.Manifests(ctx, oldScorers)
		ok("Manifests", err)
		_, err = l.Referrers(ctx, oldScorers, md.Digest, "")
		ok("Referrers", err)
		_, _, err = l.Manifest(ctx, oldScorers, rep.Manifest.Digest)
		ok("Manifest", err)
		// A record is valid when it decodes to the descriptor the store
		// wrote (spacing, key order and unknown fields aside).
		var d v1.Descriptor
		same := json.Unmarshal(data, &d) == nil && descJSON(t, d) == descJSON(t, validDesc)
		fs := scrubFindings(t, l, referenced)
		if same != (len(fs) == 0) {
			t.Fatalf("Scrub of side files holding %q (a valid record: %v) = %+v", data, same, fs)
		}
	})
}

func descJSON(t *testing.T, d v1.Descriptor) string {
	t.Helper()
	b, err := json.Marshal(d)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}
