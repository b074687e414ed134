package registry_test

import (
	"bytes"
	"encoding/json"
	"io"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// metagenBucket keeps object metagenerations as the JSON API does, which
// fake-gcs-server v1.56.1 does not (it reports 1 whatever was updated, and
// ignores preconditions on deletes): an object written anew starts at 1,
// every metadata update (PATCH) adds one
// (cloud.google.com/storage/docs/metadata#generation-number). Responses
// carry that metageneration, and a DELETE fails with 412 when its
// ifMetagenerationMatch or ifGenerationMatch differs from the object's
// (cloud.google.com/storage/docs/json_api/v1/objects/delete). before, when
// set, runs once ahead of the next DELETE: between the store's read of the
// object and its delete.
type metagenBucket struct {
	inner   http.RoundTripper
	gen     func(object string) (int64, error)
	mu      sync.Mutex
	updates map[string]int64
	before  func()
}

func objectOf(req *http.Request) string {
	_, o, ok := strings.Cut(req.URL.EscapedPath(), "/o/")
	if !ok {
		return ""
	}
	name, _ := url.PathUnescape(o)
	return name
}

func (m *metagenBucket) RoundTrip(req *http.Request) (*http.Response, error) {
	name := objectOf(req)
	patch := req.Method == http.MethodPatch || req.Header.Get("X-HTTP-Method-Override") == "PATCH"
	if req.Method == http.MethodDelete {
		m.mu.Lock()
		f := m.before
		m.before = nil
		m.mu.Unlock()
		if f != nil {
			f()
		}
		q := req.URL.Query()
		m.mu.Lock()
		mg := 1 + m.updates[name]
		m.mu.Unlock()
		if want := q.Get("ifMetagenerationMatch"); want != "" && want != strconv.FormatInt(mg, 10) {
			return preconditionFailed(req), nil
		}
		if want := q.Get("ifGenerationMatch"); want != "" {
			if g, err := m.gen(name); err == nil && strconv.FormatInt(g, 10) != want {
				return preconditionFailed(req), nil
			}
		}
	}
	resp, err := m.inner.RoundTrip(req)
	if err != nil || resp.StatusCode/100 != 2 {
		return resp, err
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	switch {
	case req.Method == http.MethodDelete:
		delete(m.updates, name)
		return resp, nil
	case patch:
		m.updates[name]++
	case strings.HasPrefix(req.URL.Path, "/upload/"):
		if n := req.URL.Query().Get("name"); n != "" {
			delete(m.updates, n)
		}
	}
	// Only the JSON API's object resources (not media: a tag object is
	// JSON too).
	api := strings.HasPrefix(req.URL.Path, "/storage/v1/") && req.URL.Query().Get("alt") != "media" || strings.HasPrefix(req.URL.Path, "/upload/")
	if !api || !strings.HasPrefix(resp.Header.Get("Content-Type"), "application/json") {
		return resp, nil
	}
	body, err := io.ReadAll(resp.Body)
	resp.Body.Close()
	if err != nil {
		return nil, err
	}
	var doc map[string]any
	if json.Unmarshal(body, &doc) == nil {
		fix := func(o map[string]any) {
			if n, ok := o["name"].(string); ok && o["metageneration"] != nil {
				if strings.HasPrefix(req.URL.Path, "/upload/") {
					delete(m.updates, n)
				}
				o["metageneration"] = strconv.FormatInt(1+m.updates[n], 10)
			}
		}
		if items, ok := doc["items"].([]any); ok {
			for _, it := range items {
				if o, ok := it.(map[string]any); ok {
					fix(o)
				}
			}
		} else {
			fix(doc)
		}
		body, _ = json.Marshal(doc)
	}
	resp.Body = io.NopCloser(bytes.NewReader(body))
	resp.ContentLength = int64(len(body))
	resp.Header.Del("Content-Length")
	return resp, nil
}

func preconditionFailed(req *http.Request) *http.Response {
	return &http.Response{StatusCode: http.StatusPreconditionFailed, Status: "412 Precondition Failed", Proto: "HTTP/1.1", ProtoMajor: 1, ProtoMinor: 1,
		Header:  http.Header{"Content-Type": {"application/json"}},
		Body:    io.NopCloser(strings.NewReader(`{"error":{"code":412,"message":"conditionNotMet"}}`)),
		Request: req}
}

// TestGCSReuseRaces: a push of the very bytes of an artifact a collection
// judged old keeps it, when it comes after the mark and when it comes
// between the store's read of the object and its delete (the
// transport's hook), where only the delete's metageneration precondition
// can tell.
func TestGCSReuseRaces(t *testing.T) {
	mb := &metagenBucket{updates: map[string]int64{}}
	srv, c := gcsEmulator(t, func(rt http.RoundTripper) http.RoundTripper { mb.inner = rt; return mb })
	oc := gcsClientFor(t, srv.URL(), nil)
	mb.gen = func(object string) (int64, error) {
		a, err := oc.Bucket(testBucket).Object(object).Attrs(t.Context())
		if err != nil {
			return 0, err
		}
		return a.Generation, nil
	}
	g := registry.NewGCS(c, testBucket, "reuse")
	storetest.ReuseRaces(t, g, func(f func()) {
		mb.mu.Lock()
		mb.before = f
		mb.mu.Unlock()
	})
}
