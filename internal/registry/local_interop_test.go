package registry_test

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/layout"
	"github.com/google/go-containerregistry/pkg/v1/types"
	"github.com/google/go-containerregistry/pkg/v1/validate"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

const (
	interopRepo         = "podcast/listener-encoder"
	interopTag          = "v1"
	interopArtifactType = "application/vnd.modelgate.encoder.v1"
)

// safetensors returns a small file in the safetensors format: an 8-byte
// little-endian header length, a JSON header (padded with spaces to a
// multiple of 8, as the format allows), then the little-endian data.
// Format: https://github.com/huggingface/safetensors (README, "Format").
func safetensors(name string, rows, cols int, seed float32) []byte {
	data := make([]byte, 4*rows*cols)
	for i := range rows * cols {
		binary.LittleEndian.PutUint32(data[4*i:], math.Float32bits(seed+float32(i)/8))
	}
	hdr, _ := json.Marshal(map[string]any{
		name: map[string]any{"dtype": "F32", "shape": []int{rows, cols}, "data_offsets": []int{0, len(data)}},
	})
	for len(hdr)%8 != 0 {
		hdr = append(hdr, ' ')
	}
	out := binary.LittleEndian.AppendUint64(nil, uint64(len(hdr)))
	out = append(out, hdr...)
	return append(out, data...)
}

// interopStore builds a store holding a real artifact-style manifest
// (image-spec v1.1: artifactType set, a config of our own media type, two
// safetensors layers), tagged interopRepo:interopTag, and a report that
// refers to it by subject. It returns the store and the model manifest.
func interopStore(t *testing.T) (*registry.Local, []byte) {
	t.Helper()
	ctx := context.Background()
	l := openLocal(t)
	blobs := []storetest.Blob{
		storetest.BlobOf([]byte(`{"kind":"encoder","name":"listener-encoder","inputs":{"shows_played":{"vocabulary":5000,"transform":"log1p"}},"code":16}`)),
		storetest.BlobOf(safetensors("encoder.weight", 4, 3, 0.25)),
		storetest.BlobOf(safetensors("encoder.bias", 1, 3, -1)),
	}
	for _, b := range blobs {
		if err := l.PutBlob(ctx, interopRepo, b.Digest, int64(len(b.Data)), bytes.NewReader(b.Data)); err != nil {
			t.Fatal(err)
		}
	}
	m := v1.Manifest{
		SchemaVersion: 2,
		MediaType:     types.OCIManifestSchema1,
		ArtifactType:  interopArtifactType,
		Config:        v1.Descriptor{MediaType: "application/vnd.modelgate.spec.v1+json", Size: int64(len(blobs[0].Data)), Digest: blobs[0].Digest},
		Layers: []v1.Descriptor{
			{MediaType: "application/vnd.modelgate.tensors.v1.safetensors", Size: int64(len(blobs[1].Data)), Digest: blobs[1].Digest},
			{MediaType: "application/vnd.modelgate.tensors.v1.safetensors", Size: int64(len(blobs[2].Data)), Digest: blobs[2].Digest},
		},
		Annotations: map[string]string{"org.opencontainers.image.created": "2026-03-01T09:00:00Z"},
	}
	raw, err := json.Marshal(m)
	if err != nil {
		t.Fatal(err)
	}
	desc, err := l.PutManifest(ctx, interopRepo, types.OCIManifestSchema1, raw)
	if err != nil {
		t.Fatal(err)
	}
	if err := l.Tag(ctx, interopRepo, interopTag, desc); err != nil {
		t.Fatal(err)
	}
	subj := desc
	subj.ArtifactType = ""
	report := storetest.NewArtifact(1, "application/vnd.modelgate.report.v1", &subj, nil)
	storetest.Push(t, l, interopRepo, "", report)
	storetest.Push(t, l, "podcast/promo-scorer", "prod", storetest.NewArtifact(2, "application/vnd.modelgate.scorer.v1", nil, nil))
	return l, raw
}

// TestLocalInteropGGCR reads the store with go-containerregistry's own
// OCI layout reader (pkg/v1/layout, v0.22.1) and checks every image with
// its validator (pkg/v1/validate), the full check that re-hashes every
// blob: layers of non-tar media types are hashed as opaque blobs there.
func TestLocalInteropGGCR(t *testing.T) {
	l, raw := interopStore(t)
	p, err := layout.FromPath(l.Dir())
	if err != nil {
		t.Fatal(err)
	}
	ii, err := p.ImageIndex()
	if err != nil {
		t.Fatal(err)
	}
	im, err := ii.IndexManifest()
	if err != nil {
		t.Fatal(err)
	}
	if len(im.Manifests) == 0 {
		t.Fatal("index.json has no entries")
	}
	tagged := 0
	for _, d := range im.Manifests {
		img, err := ii.Image(d.Digest)
		if err != nil {
			t.Fatalf("layout Image(%s): %v", d.Digest, err)
		}
		if err := validate.Image(img); err != nil {
			t.Errorf("validate.Image(%s): %v", d.Digest, err)
		}
		if d.Annotations["org.opencontainers.image.ref.name"] == interopRepo+":"+interopTag {
			tagged++
			got, err := img.RawManifest()
			if err != nil || !bytes.Equal(got, raw) {
				t.Errorf("tagged manifest read by ggcr differs: %v", err)
			}
			m, err := img.Manifest()
			if err != nil || m.ArtifactType != interopArtifactType {
				t.Errorf("ggcr sees artifactType %q, %v", m.ArtifactType, err)
			}
		}
	}
	if tagged != 1 {
		t.Errorf("%d entries carry ref.name %s:%s, want 1", tagged, interopRepo, interopTag)
	}

	// The validator really reads the layers: a flipped byte fails it.
	m, err := v1.ParseManifest(bytes.NewReader(raw))
	if err != nil {
		t.Fatal(err)
	}
	p1 := filepath.Join(l.Dir(), "blobs", "sha256", m.Layers[1].Digest.Hex)
	b, err := os.ReadFile(p1)
	if err != nil {
		t.Fatal(err)
	}
	b[len(b)-1] ^= 0x80
	writeFile(t, p1, b)
	sum := sha256.Sum256(raw)
	img, err := ii.Image(v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(sum[:])})
	if err != nil {
		t.Fatal(err)
	}
	if err := validate.Image(img); err == nil {
		t.Error("validate.Image accepted an image with a corrupt layer")
	}
}

// TestLocalInteropSkopeo reads the tag with skopeo's oci transport
// (containers/image), whose reference syntax is oci:DIR:REF with REF the
// org.opencontainers.image.ref.name value; the path is split from REF at
// the first ':', so REF may itself contain ':' and our REPO:TAG works.
func TestLocalInteropSkopeo(t *testing.T) {
	skopeo, err := exec.LookPath("skopeo")
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("skopeo is required in CI: %v", err)
		}
		t.Skipf("skopeo not installed: %v", err)
	}
	l, raw := interopStore(t)
	ref := "oci:" + l.Dir() + ":" + interopRepo + ":" + interopTag
	out, err := exec.Command(skopeo, "inspect", "--raw", ref).Output()
	if err != nil {
		t.Fatalf("skopeo inspect --raw %s: %v\n%s", ref, err, stderrOf(err))
	}
	if !bytes.Contains(out, []byte(`"artifactType":"`+interopArtifactType+`"`)) {
		t.Errorf("skopeo output lacks our artifactType:\n%s", out)
	}
	if !bytes.Equal(bytes.TrimSpace(out), raw) {
		t.Errorf("skopeo returned other bytes than the manifest:\n%s", out)
	}

	// A tag outside the image-spec ref.name grammar (annotations.md: a
	// component starts with [A-Za-z0-9]) is valid for the distribution spec
	// and for the store, but skopeo refuses the reference: the limitation
	// the Local doc comment states.
	d, err := l.Resolve(context.Background(), interopRepo, interopTag)
	if err != nil {
		t.Fatal(err)
	}
	if err := l.Tag(context.Background(), interopRepo, "_rc", d); err != nil {
		t.Fatal(err)
	}
	odd := "oci:" + l.Dir() + ":" + interopRepo + ":_rc"
	if out, err := exec.Command(skopeo, "inspect", "--raw", odd).CombinedOutput(); err == nil {
		t.Errorf("skopeo accepts %s; update the ref.name caveat in the Local doc comment:\n%s", odd, out)
	}

	// A ref.name that is not in the index is refused by skopeo too.
	missing := "oci:" + l.Dir() + ":" + interopRepo + ":v2"
	if out, err := exec.Command(skopeo, "inspect", "--raw", missing).CombinedOutput(); err == nil {
		t.Errorf("skopeo found %s:\n%s", missing, out)
	}
}

func stderrOf(err error) string {
	if ee, ok := err.(*exec.ExitError); ok {
		return strings.TrimSpace(string(ee.Stderr))
	}
	return ""
}
