package registry_test

import (
	"context"
	"errors"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	"github.com/google/go-containerregistry/pkg/name"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/remote"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// rawTags lists every tag the registry holds for host/full, the store's
// reserved ones included (go-containerregistry's client, not ours).
func rawTags(t *testing.T, host, full string, auth authn.Authenticator) []string {
	t.Helper()
	repo, err := name.NewRepository(host+"/"+full, name.Insecure)
	if err != nil {
		t.Fatal(err)
	}
	tags, err := remote.List(repo, remote.WithAuth(auth))
	if err != nil {
		t.Fatalf("listing tags of %s: %v", full, err)
	}
	return tags
}

// testRemoteBookkeepingRemoved: after a referrer and its subject are
// deleted, none of the store's bookkeeping tags for them is left on the
// registry (keep tags, per-referrer link tag, fallback index tag).
func testRemoteBookkeepingRemoved(t *testing.T, host, prefix string, auth authn.Authenticator, opts ...registry.RemoteOption) {
	ctx := context.Background()
	s := openRemote(t, host+"/"+prefix, append(opts, registry.WithRemoteAuth(auth))...)
	const repo = "podcast/listener-encoder"
	dm := storetest.Push(t, s, repo, "", storetest.NewArtifact(100, "application/vnd.modelgate.encoder.v1", nil, nil))
	d1 := storetest.Push(t, s, repo, "", storetest.NewArtifact(101, "application/vnd.modelgate.report.v1", &dm, nil))
	d2 := storetest.Push(t, s, repo, "", storetest.NewArtifact(102, "application/vnd.modelgate.report.v1", &dm, nil))
	before := rawTags(t, host, prefix+"/"+repo, auth)
	for _, d := range []string{d1.Digest.Hex, d2.Digest.Hex, dm.Digest.Hex} {
		if err := s.DeleteManifest(ctx, repo, v1.Hash{Algorithm: "sha256", Hex: d}); err != nil {
			t.Fatalf("DeleteManifest %s: %v", d, err)
		}
		if rs, err := s.Referrers(ctx, repo, dm.Digest, ""); err != nil || (d == d1.Digest.Hex && (len(rs) != 1 || rs[0].Digest != d2.Digest)) {
			t.Errorf("Referrers after deleting %s: %v, %v", d, rs, err)
		}
	}
	after := rawTags(t, host, prefix+"/"+repo, auth)
	if len(after) != 0 {
		t.Errorf("tags left after deleting everything: %v (before: %v)", after, before)
	}
	if len(before) < 3 {
		t.Errorf("before deletion the registry held tags %v, want at least the three keep tags", before)
	}
}

func TestRemoteDeleteBookkeepingMemFallback(t *testing.T) {
	testRemoteBookkeepingRemoved(t, memRegistry(t, false), "podcasts", authn.Anonymous)
}

func TestRemoteDeleteBookkeepingDockerRegistry(t *testing.T) {
	addr, auth := serviceRegistry(t)
	testRemoteBookkeepingRemoved(t, addr, uniquePrefix(t), auth)
}

// TestRemoteDeleteTagDockerRegistry: docker-registry 2.8 deletes no tag
// by name (400 DIGEST_INVALID, checked by hand with curl against the
// server .ci/services.sh starts), so a tag goes with its manifest, and a
// manifest another tag also names cannot lose one tag: refused, nothing
// changed.
func TestRemoteDeleteTagDockerRegistry(t *testing.T) {
	addr, auth := serviceRegistry(t)
	ctx := context.Background()
	s := openRemote(t, addr+"/"+uniquePrefix(t), registry.WithRemoteAuth(auth))
	const repo = "podcast/promo-scorer"
	a := storetest.NewArtifact(103, "application/vnd.modelgate.scorer.v1", nil, nil)
	d := storetest.Push(t, s, repo, "candidate-1", a)
	if err := s.Tag(ctx, repo, "candidate-2", d); err != nil {
		t.Fatal(err)
	}
	err := s.DeleteTag(ctx, repo, "candidate-1", d.Digest)
	if !errors.Is(err, errors.ErrUnsupported) || errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "candidate-2") {
		t.Errorf("DeleteTag of a tag whose manifest another tag names: %v, want ErrUnsupported (bad input) naming candidate-2", err)
	}
	for _, tag := range []string{"candidate-1", "candidate-2"} {
		if got, err := s.Resolve(ctx, repo, tag); err != nil || got.Digest != d.Digest {
			t.Errorf("after the refusal %s: %v, %v", tag, got.Digest, err)
		}
	}
	if err := s.DeleteTag(ctx, repo, "candidate-2", d.Digest); !errors.Is(err, errors.ErrUnsupported) {
		t.Fatalf("DeleteTag: %v", err)
	}
}

// TestRemoteDeleteDisabled: a registry that refuses deletes (405 with the
// distribution spec's UNSUPPORTED code, as docker-registry answers when
// storage.delete is off) gives a bad-input error saying so, and the
// manifest, its keep tag and its referrer entry stay.
func TestRemoteDeleteDisabled(t *testing.T) {
	h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(false), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, req *http.Request) {
		if req.Method == http.MethodDelete {
			w.Header().Set("Content-Type", "application/json")
			w.WriteHeader(http.StatusMethodNotAllowed)
			io.WriteString(w, `{"errors":[{"code":"UNSUPPORTED","message":"The operation is unsupported."}]}`)
			return
		}
		h.ServeHTTP(w, req)
	}))
	t.Cleanup(srv.Close)
	host := strings.TrimPrefix(srv.URL, "http://")
	ctx := context.Background()
	s := registry.NewRetry(openRemote(t, host+"/podcasts", registry.WithRemoteAuth(authn.Anonymous)), registry.RetryOptions{Initial: time.Millisecond})
	d := s.(registry.Deleter)
	const repo = "podcast/listener-encoder"
	dm := storetest.Push(t, s, repo, "", storetest.NewArtifact(104, "application/vnd.modelgate.encoder.v1", nil, nil))
	dr := storetest.Push(t, s, repo, "", storetest.NewArtifact(105, "application/vnd.modelgate.report.v1", &dm, nil))
	before := rawTags(t, host, "podcasts/"+repo, authn.Anonymous)
	err := d.DeleteManifest(ctx, repo, dr.Digest)
	if !errors.Is(err, errors.ErrUnsupported) || errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "does not allow deleting") {
		t.Fatalf("DeleteManifest on a registry without deletes: %v, want ErrUnsupported (bad input) saying so", err)
	}
	if after := rawTags(t, host, "podcasts/"+repo, authn.Anonymous); strings.Join(after, ",") != strings.Join(before, ",") {
		t.Errorf("tags after the refusal %v, before %v", after, before)
	}
	if rs, err := s.Referrers(ctx, repo, dm.Digest, ""); err != nil || len(rs) != 1 {
		t.Errorf("Referrers after the refusal: %v, %v", rs, err)
	}
}
