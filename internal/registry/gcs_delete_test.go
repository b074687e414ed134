package registry_test

import (
	"context"
	"errors"
	"io"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// hookDelete runs before, once, ahead of the first DELETE request whose
// path contains match. It also applies the JSON API's precondition to
// every DELETE, which fake-gcs-server v1.56.1 ignores on deletes (its
// deleteObject reads only the generation parameter): objects.delete with
// ifGenerationMatch fails with 412 when the object's generation differs
// (cloud.google.com/storage/docs/json_api/v1/objects/delete). A DELETE
// without the parameter is counted in unconditional.
type hookDelete struct {
	inner         http.RoundTripper
	attrs         func(object string) (int64, error)
	mu            sync.Mutex
	match         string
	before        func()
	unconditional int
}

func (h *hookDelete) RoundTrip(req *http.Request) (*http.Response, error) {
	if req.Method != http.MethodDelete {
		return h.inner.RoundTrip(req)
	}
	h.mu.Lock()
	f := h.before
	if f != nil && strings.Contains(req.URL.EscapedPath(), h.match) {
		h.before = nil
	} else {
		f = nil
	}
	h.mu.Unlock()
	if f != nil {
		f()
	}
	want := req.URL.Query().Get("ifGenerationMatch")
	if want == "" {
		h.mu.Lock()
		h.unconditional++
		h.mu.Unlock()
		return h.inner.RoundTrip(req)
	}
	_, object, _ := strings.Cut(req.URL.Path, "/o/")
	if gen, err := h.attrs(object); err == nil && strconv.FormatInt(gen, 10) != want {
		return &http.Response{StatusCode: http.StatusPreconditionFailed, Status: "412 Precondition Failed", Proto: "HTTP/1.1", ProtoMajor: 1, ProtoMinor: 1,
			Header:  http.Header{"Content-Type": {"application/json"}},
			Body:    io.NopCloser(strings.NewReader(`{"error":{"code":412,"message":"conditionNotMet"}}`)),
			Request: req}, nil
	}
	return h.inner.RoundTrip(req)
}

// TestGCSDeleteGenerationPreconditions: an object rewritten between the
// store's read and its delete (another writer, through its own client) is
// not deleted: the delete carries the generation read
// (ifGenerationMatch, the JSON API's precondition, honoured by the
// emulator), and the store reports a conflict.
func TestGCSDeleteGenerationPreconditions(t *testing.T) {
	ctx := context.Background()
	const repo = "podcast/listener-encoder"
	hook := &hookDelete{}
	srv, c := gcsEmulator(t, func(rt http.RoundTripper) http.RoundTripper { hook.inner = rt; return hook })
	g := registry.NewGCS(c, testBucket, "gen")
	oc := gcsClientFor(t, srv.URL(), nil)
	other := registry.NewGCS(oc, testBucket, "gen")
	hook.attrs = func(object string) (int64, error) {
		a, err := oc.Bucket(testBucket).Object(object).Attrs(ctx)
		if err != nil {
			return 0, err
		}
		return a.Generation, nil
	}
	a := storetest.NewArtifact(110, "application/vnd.modelgate.encoder.v1", nil, nil)
	d := storetest.Push(t, g, repo, "candidate-3", a)

	// The tag is rewritten (same target, new generation) just before the
	// delete reaches the bucket.
	hook.mu.Lock()
	hook.match, hook.before = "_tags", func() {
		if err := other.Tag(ctx, repo, "candidate-3", d); err != nil {
			t.Errorf("rewriting the tag: %v", err)
		}
	}
	hook.mu.Unlock()
	err := g.DeleteTag(ctx, repo, "candidate-3", d.Digest)
	if !errors.Is(err, registry.ErrConflict) || errkind.Of(err) != errkind.Conflict {
		t.Errorf("DeleteTag racing a rewrite: %v, want ErrConflict", err)
	}
	if got, err := g.Resolve(ctx, repo, "candidate-3"); err != nil || got.Digest != d.Digest {
		t.Errorf("after the lost delete the tag is %v, %v", got.Digest, err)
	}

	// A blob rewritten (a damaged copy replaced, or re-uploaded) just
	// before its delete stays.
	blobKey := "gen/blobs/sha256/" + a.Layers[0].Digest.Hex
	hook.mu.Lock()
	hook.match, hook.before = "blobs%2Fsha256", func() {
		w := c.Bucket(testBucket).Object(blobKey).NewWriter(ctx)
		w.Write(a.Layers[0].Data)
		if err := w.Close(); err != nil {
			t.Errorf("rewriting the blob: %v", err)
		}
	}
	hook.mu.Unlock()
	err = g.DeleteBlob(ctx, repo, a.Layers[0].Digest)
	if !errors.Is(err, registry.ErrConflict) {
		t.Errorf("DeleteBlob racing a rewrite: %v, want ErrConflict", err)
	}
	if _, err := g.StatBlob(ctx, repo, a.Layers[0].Digest); err != nil {
		t.Errorf("after the lost delete the blob: %v", err)
	}
	// Without a race both go.
	if err := g.DeleteTag(ctx, repo, "candidate-3", d.Digest); err != nil {
		t.Fatal(err)
	}
	if err := g.DeleteBlob(ctx, repo, a.Layers[0].Digest); err != nil {
		t.Fatal(err)
	}
	if _, err := g.StatBlob(ctx, repo, a.Layers[0].Digest); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("after DeleteBlob: %v", err)
	}
	if err := g.DeleteManifest(ctx, repo, d.Digest); err != nil {
		t.Fatal(err)
	}
	if hook.unconditional != 0 {
		t.Errorf("%d DELETE requests without ifGenerationMatch", hook.unconditional)
	}
}
