package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"log"
	"net/http/httptest"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// runMG runs the CLI in this process and returns exit code and output.
func runMG(t *testing.T, args ...string) (int, string, string) {
	t.Helper()
	var so, se bytes.Buffer
	code := run(context.Background(), args, strings.NewReader(""), &so, &se)
	return code, so.String(), se.String()
}

// copyFixtureStore makes a local store with the tiny encoder and scorer
// pushed, a report on the scorer and an approval on the report (a
// referrer of a referrer).
func copyFixtureStore(t *testing.T) (string, *registry.Local) {
	t.Helper()
	ctx := context.Background()
	models := t.TempDir()
	if _, err := fixture.Write(models); err != nil {
		t.Fatal(err)
	}
	dir := filepath.Join(t.TempDir(), "src")
	s, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range []struct{ dir, ref string }{
		{fixture.EncoderDir, "podcast/listener-encoder:v1"},
		{fixture.ScorerDir, "podcast/promo-scorer:candidate"},
	} {
		ref, err := registry.ParseRef(p.ref, false)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := artifact.PushModelDir(ctx, s, filepath.Join(models, p.dir), ref, artifact.Options{}); err != nil {
			t.Fatalf("push %s: %v", p.ref, err)
		}
	}
	scorer, err := s.Resolve(ctx, "podcast/promo-scorer", "candidate")
	if err != nil {
		t.Fatal(err)
	}
	subj := v1.Descriptor{MediaType: scorer.MediaType, Size: scorer.Size, Digest: scorer.Digest}
	report := storetest.Push(t, s, "podcast/promo-scorer", "", storetest.NewArtifact(1, "application/vnd.modelgate.report.v1", &subj, map[string]string{"org.opencontainers.image.created": "2026-02-01T10:00:00Z"}))
	rs := v1.Descriptor{MediaType: report.MediaType, Size: report.Size, Digest: report.Digest}
	storetest.Push(t, s, "podcast/promo-scorer", "", storetest.NewArtifact(2, "application/vnd.modelgate.approval.v1", &rs, nil))
	return dir, s
}

// storeSnapshot lists, per repository, tags → digests and all manifest
// digests with their referrers.
func storeSnapshot(t *testing.T, s registry.Store) map[string]string {
	t.Helper()
	ctx := context.Background()
	out := map[string]string{}
	repos, err := s.Repositories(ctx)
	if err != nil {
		t.Fatal(err)
	}
	for _, repo := range repos {
		tags, err := s.Tags(ctx, repo)
		if err != nil {
			t.Fatal(err)
		}
		for _, tag := range tags {
			d, err := s.Resolve(ctx, repo, tag)
			if err != nil {
				t.Fatal(err)
			}
			out[repo+":"+tag] = d.Digest.String()
		}
		ds, err := s.(registry.ManifestLister).Manifests(ctx, repo)
		if err != nil {
			t.Fatal(err)
		}
		for _, d := range ds {
			refs, err := s.Referrers(ctx, repo, d.Digest, "")
			if err != nil {
				t.Fatal(err)
			}
			var rs []string
			for _, r := range refs {
				rs = append(rs, r.Digest.String()+" "+r.ArtifactType)
			}
			slices.Sort(rs)
			out[repo+"@"+d.Digest.String()] = strings.Join(rs, ",")
		}
	}
	return out
}

// TestCopyRoundTripThroughRegistry copies a local store to the in-memory
// registry (without the referrers API, so through the tag fallback) and
// back to another local store: tags, digests and referrers are the same,
// the result verifies, and a second copy writes nothing.
func TestCopyRoundTripThroughRegistry(t *testing.T) {
	t.Setenv(registry.EnvRegistryUser, "")
	t.Setenv(registry.EnvRegistryPassword, "")
	srcDir, src := copyFixtureStore(t)
	srv := httptest.NewServer(ggcrregistry.New(ggcrregistry.Logger(log.New(io.Discard, "", 0))))
	t.Cleanup(srv.Close)
	reg := strings.TrimPrefix(srv.URL, "http://") + "/podcasts"

	code, out, errOut := runMG(t, "copy", "--all", "--store", srcDir, "--dest", reg, "--json")
	if code != 0 {
		t.Fatalf("copy to the registry: exit %d: %s", code, errOut)
	}
	var res registry.CopyResult
	if err := json.Unmarshal([]byte(out), &res); err != nil {
		t.Fatalf("copy --json output: %v\n%s", err, out)
	}
	if len(res.Tags) != 2 || res.BlobsCopied == 0 || len(res.Manifests) != 4 {
		t.Errorf("first copy: %d tags, %d blobs copied, %d manifests; want 2, >0, 4", len(res.Tags), res.BlobsCopied, len(res.Manifests))
	}

	backDir := filepath.Join(t.TempDir(), "back")
	if code, _, errOut := runMG(t, "copy", "--all", "--store", reg, "--dest", backDir, "-q"); code != 0 {
		t.Fatalf("copy back: exit %d: %s", code, errOut)
	}
	back, err := registry.OpenLocal(backDir)
	if err != nil {
		t.Fatal(err)
	}
	want, got := storeSnapshot(t, src), storeSnapshot(t, back)
	if len(want) == 0 {
		t.Fatal("empty snapshot")
	}
	for k, v := range want {
		if got[k] != v {
			t.Errorf("%s: after the round trip %q, want %q", k, got[k], v)
		}
	}
	for k := range got {
		if _, ok := want[k]; !ok {
			t.Errorf("%s: appeared in the round trip", k)
		}
	}
	rep, err := artifact.VerifyStore(context.Background(), back, nil)
	if err != nil || !rep.OK() {
		t.Errorf("verify after the round trip: %v, %+v", err, rep)
	}

	// Resumable: copying again finds everything there.
	code, out, errOut = runMG(t, "copy", "--all", "--store", srcDir, "--dest", reg, "--json")
	if code != 0 {
		t.Fatalf("second copy: exit %d: %s", code, errOut)
	}
	res = registry.CopyResult{}
	if err := json.Unmarshal([]byte(out), &res); err != nil {
		t.Fatal(err)
	}
	if res.BlobsCopied != 0 {
		t.Errorf("second copy copied %d blobs, want 0", res.BlobsCopied)
	}
	for _, m := range res.Manifests {
		if !m.Present {
			t.Errorf("second copy wrote %s again", m.Digest)
		}
	}

	// One reference: the scorer with its report and the report's approval.
	oneDir := filepath.Join(t.TempDir(), "one")
	code, out, errOut = runMG(t, "copy", "podcast/promo-scorer:candidate", "--store", reg, "--dest", oneDir)
	if code != 0 {
		t.Fatalf("copy one: exit %d: %s", code, errOut)
	}
	if n := strings.Count(out, "\n"); n != 5 { // 3 manifests, the scorer's encoder, 1 tag
		t.Errorf("copy of one reference printed %d lines, want 5:\n%s", n, out)
	}
	if !strings.Contains(out, "podcast/listener-encoder@"+want["podcast/listener-encoder:v1"]) {
		t.Errorf("copy of the scorer does not bring its encoder:\n%s", out)
	}
	if !strings.Contains(out, "refers to "+want["podcast/promo-scorer:candidate"]) {
		t.Errorf("copy output does not show the report referring to the scorer:\n%s", out)
	}
}

// TestCopyUsage: bad invocations exit 2.
func TestCopyUsage(t *testing.T) {
	dir := t.TempDir()
	for _, args := range [][]string{
		{"copy", "--store", dir, "podcast/x:v1"},                           // no --dest
		{"copy", "--store", dir, "--dest", dir + "2"},                      // no ref, no --all
		{"copy", "--store", dir, "--dest", dir + "2", "--all", "a/b:v1"},   // both
		{"copy", "--store", dir, "--dest", "https://example.com/p", "a:1"}, // URL form refused
	} {
		if code, _, _ := runMG(t, args...); code != 2 {
			t.Errorf("%q: exit %d, want 2", args, code)
		}
	}
}
