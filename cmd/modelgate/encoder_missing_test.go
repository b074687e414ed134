package main

import (
	"context"
	"io"
	"log"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"testing"

	"github.com/google/go-containerregistry/pkg/name"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	"github.com/google/go-containerregistry/pkg/v1/remote"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/registry"
)

// TestEncoderMissingIsMissingInput: a scorer whose encoder is gone from
// the store (deleted from the registry after the push) is missing input,
// not damage: show and score exit 2 naming the encoder, while verify,
// which audits the store, still reports it.
func TestEncoderMissingIsMissingInput(t *testing.T) {
	t.Setenv(registry.EnvRegistryUser, "")
	t.Setenv(registry.EnvRegistryPassword, "")
	ctx := context.Background()
	srv := httptest.NewServer(ggcrregistry.New(ggcrregistry.Logger(log.New(io.Discard, "", 0))))
	t.Cleanup(srv.Close)
	host := strings.TrimPrefix(srv.URL, "http://")
	loc := host + "/podcasts"
	st, err := registry.OpenRemote(loc)
	if err != nil {
		t.Fatal(err)
	}
	models := t.TempDir()
	if _, err := fixture.Write(models); err != nil {
		t.Fatal(err)
	}
	var enc artifact.PushResult
	for _, p := range []struct{ dir, ref string }{
		{fixture.EncoderDir, "listener-encoder:v1"},
		{fixture.ScorerDir, "promo-scorer:v1"},
	} {
		ref, _ := registry.ParseRef(p.ref, false)
		res, err := artifact.PushModelDir(ctx, st, filepath.Join(models, p.dir), ref, artifact.Options{})
		if err != nil {
			t.Fatalf("push %s: %v", p.ref, err)
		}
		if p.dir == fixture.EncoderDir {
			enc = *res
		}
	}
	d, err := name.NewDigest(host+"/podcasts/listener-encoder@"+enc.Digest, name.Insecure)
	if err != nil {
		t.Fatal(err)
	}
	if err := remote.Delete(d); err != nil {
		t.Fatal(err)
	}
	holdout := filepath.Join(t.TempDir(), "rows.jsonl") // never read: the model is refused first
	out := filepath.Join(t.TempDir(), "out.jsonl")
	for _, args := range [][]string{
		{"show", "promo-scorer:v1"},
		{"show", "--json", "promo-scorer:v1"},
		{"score", "promo-scorer:v1", "--holdout", holdout, "--out", out},
	} {
		code, _, errOut := runMG(t, append([]string{"--store", loc}, args...)...)
		if code != 2 || !strings.Contains(errOut, enc.Digest) || !strings.Contains(errOut, "not in") {
			t.Errorf("%v: exit %d, want 2 naming the encoder %s\n%s", args, code, enc.Digest, errOut)
		}
	}
}
