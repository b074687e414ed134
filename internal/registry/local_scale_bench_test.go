package registry_test

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

const (
	scaleRepo     = "podcast/promo-scorer"
	scaleRelease  = "application/vnd.modelgate.release.v1"
	scaleApproval = "application/vnd.modelgate.approval.v1"
	scaleScorer   = "application/vnd.modelgate.scorer.v1"
)

// scaleStore is a store whose repository holds a model m (tagged prod), a
// candidate c (tagged candidate), three approvals of each, and n release
// records whose subject is m: the shape of a tag with a long release log.
type scaleStore struct {
	l      *registry.Local
	m, c   v1.Descriptor
	shared storetest.Artifact // config and layers every manifest uses
}

// scaleManifest is a small image manifest on the shared blobs with the
// given artifactType, subject and a sequence annotation that makes it
// unique.
func scaleManifest(shared storetest.Artifact, at string, subject *v1.Descriptor, seq int) storetest.Blob {
	m := v1.Manifest{
		SchemaVersion: 2,
		MediaType:     types.OCIManifestSchema1,
		ArtifactType:  at,
		Config:        v1.Descriptor{MediaType: "application/vnd.modelgate.spec.v1+json", Size: int64(len(shared.Config.Data)), Digest: shared.Config.Digest},
		Subject:       subject,
		Annotations:   map[string]string{"dev.modelgate.seq": fmt.Sprint(seq), "org.opencontainers.image.created": "2026-03-01T09:00:00Z"},
	}
	for _, l := range shared.Layers {
		m.Layers = append(m.Layers, v1.Descriptor{MediaType: "application/vnd.modelgate.tensors.v1.safetensors", Size: int64(len(l.Data)), Digest: l.Digest})
	}
	raw, err := json.Marshal(m)
	if err != nil {
		panic(err)
	}
	return storetest.BlobOf(raw)
}

// newScaleStore writes the store's files directly, for speed: the blobs,
// and index.json in the layout earlier versions of the store wrote (one
// untagged entry per manifest, with dev.modelgate.repository and
// dev.modelgate.subject, plus one entry per tag). OpenLocal then reads it
// as it finds it: a version that keeps side files converts it to what its
// PutManifest and Tag would have written (checked below by listing).
func newScaleStore(b *testing.B, n int) *scaleStore {
	b.Helper()
	dir := filepath.Join(b.TempDir(), "store")
	blobs := filepath.Join(dir, "blobs", "sha256")
	if err := os.MkdirAll(blobs, 0o755); err != nil {
		b.Fatal(err)
	}
	put := func(bl storetest.Blob) {
		if err := os.WriteFile(filepath.Join(blobs, bl.Digest.Hex), bl.Data, 0o644); err != nil {
			b.Fatal(err)
		}
	}
	s := &scaleStore{shared: storetest.NewArtifact(700, scaleScorer, nil, nil)}
	put(s.shared.Config)
	for _, l := range s.shared.Layers {
		put(l)
	}
	var entries []v1.Descriptor
	add := func(bl storetest.Blob, at string, subject *v1.Descriptor, tags ...string) v1.Descriptor {
		put(bl)
		d := v1.Descriptor{MediaType: types.OCIManifestSchema1, Size: int64(len(bl.Data)), Digest: bl.Digest, ArtifactType: at,
			Annotations: map[string]string{"dev.modelgate.repository": scaleRepo, "dev.modelgate.seq": "", "org.opencontainers.image.created": "2026-03-01T09:00:00Z"}}
		var m v1.Manifest
		if err := json.Unmarshal(bl.Data, &m); err != nil {
			b.Fatal(err)
		}
		d.Annotations["dev.modelgate.seq"] = m.Annotations["dev.modelgate.seq"]
		if subject != nil {
			d.Annotations["dev.modelgate.subject"] = subject.Digest.String()
		}
		entries = append(entries, d)
		for _, t := range tags {
			td := d
			td.Annotations = map[string]string{"org.opencontainers.image.ref.name": scaleRepo + ":" + t}
			for k, v := range d.Annotations {
				td.Annotations[k] = v
			}
			entries = append(entries, td)
		}
		out := d
		out.Annotations = nil
		return out
	}
	s.m = add(scaleManifest(s.shared, scaleScorer, nil, -1), scaleScorer, nil, "prod")
	s.c = add(scaleManifest(s.shared, scaleScorer, nil, -2), scaleScorer, nil, "candidate")
	ms, cs := s.m, s.c
	ms.ArtifactType, cs.ArtifactType = "", ""
	for i := range 3 {
		add(scaleManifest(s.shared, scaleApproval, &ms, -10-i), scaleApproval, &ms)
		add(scaleManifest(s.shared, scaleApproval, &cs, -20-i), scaleApproval, &cs)
	}
	var head v1.Descriptor
	for i := range n {
		head = add(scaleManifest(s.shared, scaleRelease, &ms, i), scaleRelease, &ms)
	}
	entries = append(entries, v1.Descriptor{MediaType: head.MediaType, Size: head.Size, Digest: head.Digest, ArtifactType: scaleRelease,
		Annotations: map[string]string{"dev.modelgate.repository": scaleRepo, "org.opencontainers.image.ref.name": scaleRepo + ":release-prod"}})
	idx, err := json.MarshalIndent(v1.IndexManifest{SchemaVersion: 2, MediaType: types.OCIImageIndex, Manifests: entries}, "", "  ")
	if err != nil {
		b.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "index.json"), idx, 0o644); err != nil {
		b.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "oci-layout"), []byte(`{"imageLayoutVersion":"1.0.0"}`), 0o644); err != nil {
		b.Fatal(err)
	}
	if s.l, err = registry.OpenLocal(dir); err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	if all, err := s.l.Manifests(ctx, scaleRepo); err != nil || len(all) != n+8 {
		b.Fatalf("store holds %d manifests (%v), want %d", len(all), err, n+8)
	}
	if rs, err := s.l.Referrers(ctx, scaleRepo, s.m.Digest, scaleRelease); err != nil || len(rs) != n {
		b.Fatalf("model has %d release referrers (%v), want %d", len(rs), err, n)
	}
	return s
}

// BenchmarkLocalScale times single store calls on a repository that
// already holds 10, 1,000 or 10,000 release records (all referrers of one
// model): putting one more untagged record (blob and fsyncs included);
// the approvals of the model with the long history and of another model
// (three each); resolving a tag; moving a tag; and listing every manifest
// (the one call whose answer grows with the history), warm and from a
// newly opened store. Each record put
// during the benchmark adds to the store, which grows by b.N.
func BenchmarkLocalScale(b *testing.B) {
	ctx := context.Background()
	for _, n := range []int{10, 1000, 10000} {
		s := newScaleStore(b, n)
		ms := s.m
		ms.ArtifactType = ""
		seq := n
		b.Run(fmt.Sprintf("manifests=%d/PutManifest-untagged", n), func(b *testing.B) {
			for range b.N {
				rec := scaleManifest(s.shared, scaleRelease, &ms, seq)
				seq++
				if _, err := s.l.PutManifest(ctx, scaleRepo, types.OCIManifestSchema1, rec.Data); err != nil {
					b.Fatal(err)
				}
			}
		})
		b.Run(fmt.Sprintf("manifests=%d/Referrers-approvals-of-long-history", n), func(b *testing.B) {
			for range b.N {
				if rs, err := s.l.Referrers(ctx, scaleRepo, s.m.Digest, scaleApproval); err != nil || len(rs) != 3 {
					b.Fatalf("%d referrers, %v", len(rs), err)
				}
			}
		})
		b.Run(fmt.Sprintf("manifests=%d/Referrers-approvals-of-other-model", n), func(b *testing.B) {
			for range b.N {
				if rs, err := s.l.Referrers(ctx, scaleRepo, s.c.Digest, scaleApproval); err != nil || len(rs) != 3 {
					b.Fatalf("%d referrers, %v", len(rs), err)
				}
			}
		})
		b.Run(fmt.Sprintf("manifests=%d/Resolve", n), func(b *testing.B) {
			for range b.N {
				if _, err := s.l.Resolve(ctx, scaleRepo, "prod"); err != nil {
					b.Fatal(err)
				}
			}
		})
		b.Run(fmt.Sprintf("manifests=%d/SwapTag", n), func(b *testing.B) {
			cur, next := s.m, s.c
			for range b.N {
				if err := s.l.SwapTag(ctx, scaleRepo, "prod", cur.Digest, next); err != nil {
					b.Fatal(err)
				}
				cur, next = next, cur
			}
			b.StopTimer()
			if cur.Digest != s.m.Digest {
				if err := s.l.SwapTag(ctx, scaleRepo, "prod", cur.Digest, s.m); err != nil {
					b.Fatal(err)
				}
			}
		})
		b.Run(fmt.Sprintf("manifests=%d/Manifests", n), func(b *testing.B) {
			for range b.N {
				if _, err := s.l.Manifests(ctx, scaleRepo); err != nil {
					b.Fatal(err)
				}
			}
		})
		// A new process: open the store, then list (nothing read before).
		b.Run(fmt.Sprintf("manifests=%d/OpenLocal+Manifests", n), func(b *testing.B) {
			for range b.N {
				l, err := registry.OpenLocal(s.l.Dir())
				if err != nil {
					b.Fatal(err)
				}
				if _, err := l.Manifests(ctx, scaleRepo); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
