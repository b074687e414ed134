package registry_test

import (
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/google/go-containerregistry/pkg/authn"
	"github.com/google/go-containerregistry/pkg/name"
	"github.com/google/go-containerregistry/pkg/v1/layout"
	"github.com/google/go-containerregistry/pkg/v1/remote"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// TestRemoteInteropSkopeo pushes the tiny encoder to the real registry
// server with modelgate, copies it out with an independent OCI client
// (Debian's skopeo, containers/image: `skopeo copy docker://… oci:DIR:TAG`)
// and verifies the copy with modelgate.
//
// skopeo's oci: transport names the copy by its ref.name annotation, here
// just TAG (image-spec annotations.md allows any ref.name), while the local
// store keys index.json entries by repository (dev.modelgate.repository)
// and ignores entries it did not write. The test therefore checks the
// digest skopeo recorded against the one modelgate pushed, then adopts
// skopeo's entry into repository REPO through the store's own PutManifest
// and Tag (which re-check every blob skopeo wrote), and runs the
// whole-store verification.
func TestRemoteInteropSkopeo(t *testing.T) {
	skopeo, err := exec.LookPath("skopeo")
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("skopeo is required in CI: %v", err)
		}
		t.Skipf("skopeo not installed: %v", err)
	}
	addr, auth := serviceRegistry(t)
	ctx := context.Background()
	prefix := uniquePrefix(t)
	r := openRemote(t, addr+"/"+prefix, registry.WithRemoteAuth(auth))
	models := t.TempDir()
	if _, err := fixture.Write(models); err != nil {
		t.Fatal(err)
	}
	const repo, tag = "podcast/listener-encoder", "v1"
	res, err := artifact.PushModelDir(ctx, r, filepath.Join(models, fixture.EncoderDir), registry.Ref{Repository: repo, Tag: tag}, artifact.Options{})
	if err != nil {
		t.Fatal(err)
	}

	dir := filepath.Join(t.TempDir(), "skopeo-copy")
	creds := os.Getenv("MODELGATE_TEST_REGISTRY_USER") + ":" + os.Getenv("MODELGATE_TEST_REGISTRY_PASSWORD")
	src := "docker://" + addr + "/" + prefix + "/" + repo + ":" + tag
	cmd := exec.Command(skopeo, "copy", "--preserve-digests", "--src-creds", creds, "--src-tls-verify=false", src, "oci:"+dir+":"+tag)
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("skopeo copy %s: %v\n%s", src, err, out)
	}

	// What skopeo wrote, read with go-containerregistry's layout reader.
	p, err := layout.FromPath(dir)
	if err != nil {
		t.Fatal(err)
	}
	idx, err := p.ImageIndex()
	if err != nil {
		t.Fatal(err)
	}
	im, err := idx.IndexManifest()
	if err != nil {
		t.Fatal(err)
	}
	if len(im.Manifests) != 1 || im.Manifests[0].Annotations["org.opencontainers.image.ref.name"] != tag {
		t.Fatalf("skopeo's index.json = %+v, want one entry named %q", im.Manifests, tag)
	}
	if got := im.Manifests[0].Digest.String(); got != res.Digest {
		t.Fatalf("skopeo copied %s, modelgate pushed %s", got, res.Digest)
	}

	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatalf("OpenLocal on skopeo's layout: %v", err)
	}
	raw, err := os.ReadFile(filepath.Join(dir, "blobs", "sha256", im.Manifests[0].Digest.Hex))
	if err != nil {
		t.Fatal(err)
	}
	desc, err := l.PutManifest(ctx, repo, im.Manifests[0].MediaType, raw)
	if err != nil {
		t.Fatalf("adopting skopeo's manifest: %v", err)
	}
	if err := l.Tag(ctx, repo, tag, desc); err != nil {
		t.Fatal(err)
	}
	rep, err := artifact.VerifyStore(ctx, l, nil)
	if err != nil {
		t.Fatal(err)
	}
	if !rep.OK() || rep.Models != 1 {
		t.Errorf("verify of skopeo's copy: %d damage, %d models; findings %+v", rep.Damage, rep.Models, rep.Findings)
	}
}

// TestRemoteInteropGGCRReferrers: a referrer modelgate pushed to a
// registry without the referrers API is found by go-containerregistry's
// remote.Referrers (v0.22.1), which reads the spec's fallback tag
// (distribution-spec v1.1, "Referrers Tag Schema") — the index other tools
// rely on.
func TestRemoteInteropGGCRReferrers(t *testing.T) {
	ctx := context.Background()
	addr := memRegistry(t, false)
	r := openRemote(t, addr+"/podcasts", registry.WithRemoteAuth(authn.Anonymous))
	const repo = "podcast/promo-scorer"
	md := storetest.Push(t, r, repo, "candidate", storetest.NewArtifact(1, "application/vnd.modelgate.scorer.v1", nil, nil))
	subj := md
	subj.ArtifactType = ""
	report := storetest.NewArtifact(2, "application/vnd.modelgate.report.v1", &subj, nil)
	storetest.Push(t, r, repo, "", report)

	d, err := name.NewDigest(addr + "/podcasts/" + repo + "@" + md.Digest.String())
	if err != nil {
		t.Fatal(err)
	}
	ii, err := remote.Referrers(d, remote.WithContext(ctx))
	if err != nil {
		t.Fatalf("ggcr remote.Referrers: %v", err)
	}
	im, err := ii.IndexManifest()
	if err != nil {
		t.Fatal(err)
	}
	if len(im.Manifests) != 1 || im.Manifests[0].Digest != report.Manifest.Digest || im.Manifests[0].ArtifactType != "application/vnd.modelgate.report.v1" {
		t.Errorf("ggcr sees referrers %+v, want the report %s", im.Manifests, report.Manifest.Digest)
	}
	// The store's bookkeeping tags stay out of Tags.
	tags, err := r.Tags(ctx, repo)
	if err != nil || len(tags) != 1 || tags[0] != "candidate" {
		t.Errorf("Tags = %q, %v; want [candidate]", tags, err)
	}
}
