package registry_test

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"sync/atomic"
	"testing"
	"time"

	"cloud.google.com/go/storage"
	"github.com/fsouza/fake-gcs-server/fakestorage"
	gax "github.com/googleapis/gax-go/v2"
	"google.golang.org/api/option"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

const testBucket = "podcast-models"

// gcsEmulator runs fake-gcs-server (v1.56.1) in this process but serves it
// on a real loopback port, and returns a storage client that reaches it
// over HTTP (the JSON API endpoint; no credentials), so requests take the
// same path as against GCS. rt, when not nil, wraps the client's transport
// (request counting, fault injection).
func gcsEmulator(t testing.TB, wrap func(http.RoundTripper) http.RoundTripper) (*fakestorage.Server, *storage.Client) {
	t.Helper()
	srv, err := fakestorage.NewServerWithOptions(fakestorage.Options{
		Scheme:     "http",
		Host:       "127.0.0.1",
		Port:       0,
		PublicHost: "127.0.0.1",
		Writer:     io.Discard,
	})
	if err != nil {
		t.Fatalf("starting fake-gcs-server: %v", err)
	}
	t.Cleanup(srv.Stop)
	srv.CreateBucketWithOpts(fakestorage.CreateBucketOpts{Name: testBucket})
	return srv, gcsClientFor(t, srv.URL(), wrap)
}

// gcsClientFor returns a new storage client for the emulator at url (its
// own connections, as another process would have).
func gcsClientFor(t testing.TB, url string, wrap func(http.RoundTripper) http.RoundTripper) *storage.Client {
	t.Helper()
	var rt http.RoundTripper = http.DefaultTransport.(*http.Transport).Clone()
	if wrap != nil {
		rt = wrap(rt)
	}
	c, err := storage.NewClient(context.Background(),
		option.WithEndpoint(url+"/storage/v1/"),
		option.WithoutAuthentication(),
		option.WithHTTPClient(&http.Client{Transport: rt}),
	)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { c.Close() })
	// The library's own retries back off from 1s; tests need not wait.
	c.SetRetry(storage.WithBackoff(gax.Backoff{Initial: time.Millisecond, Max: 10 * time.Millisecond}))
	return c
}

var gcsPrefixSeq atomic.Int64

func TestGCSConformance(t *testing.T) {
	_, c := gcsEmulator(t, nil)
	storetest.Run(t, func(t *testing.T) registry.Store {
		return registry.NewGCS(c, testBucket, fmt.Sprintf("stores/s%d", gcsPrefixSeq.Add(1)))
	})
}

func TestGCSConformanceNoPrefix(t *testing.T) {
	storetest.Run(t, func(t *testing.T) registry.Store {
		_, c := gcsEmulator(t, nil)
		return registry.NewGCS(c, testBucket, "")
	})
}
