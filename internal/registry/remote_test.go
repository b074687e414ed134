package registry_test

import (
	"fmt"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"os"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"

	"modelgate/internal/registry"
	"modelgate/internal/registry/storetest"
)

// memRegistry starts go-containerregistry's in-memory registry
// (pkg/registry, v0.22.1) on a loopback httptest server and returns its
// host:port.
func memRegistry(t testing.TB, referrers bool) string {
	t.Helper()
	h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(referrers), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	srv := httptest.NewServer(h)
	t.Cleanup(srv.Close)
	return strings.TrimPrefix(srv.URL, "http://")
}

func openRemote(t testing.TB, loc string, opts ...registry.RemoteOption) *registry.Remote {
	t.Helper()
	r, err := registry.OpenRemote(loc, opts...)
	if err != nil {
		t.Fatal(err)
	}
	return r
}

func TestRemoteConformanceMemReferrersAPI(t *testing.T) {
	storetest.Run(t, func(t *testing.T) registry.Store {
		return openRemote(t, memRegistry(t, true)+"/podcasts", registry.WithRemoteAuth(authn.Anonymous))
	})
}

func TestRemoteConformanceMemFallback(t *testing.T) {
	storetest.Run(t, func(t *testing.T) registry.Store {
		return openRemote(t, "oci://"+memRegistry(t, false)+"/podcasts", registry.WithRemoteAuth(authn.Anonymous))
	})
}

// TestRemoteConformanceNoCatalog runs the suite against the in-memory
// registry behind a handler that refuses /v2/_catalog as hosted registries
// do (404 UNSUPPORTED).
func TestRemoteConformanceNoCatalog(t *testing.T) {
	storetest.RunWithoutCatalog(t, func(t *testing.T) registry.Store {
		h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
		srv := httptest.NewServer(storetest.NoCatalog(h))
		t.Cleanup(srv.Close)
		return openRemote(t, strings.TrimPrefix(srv.URL, "http://")+"/podcasts", registry.WithRemoteAuth(authn.Anonymous))
	})
}

// serviceRegistry returns the address and credentials of the real
// registry server (Debian's docker-registry) that .ci/services.sh starts,
// skipping when it is not configured — or failing, in CI when
// MODELGATE_REQUIRE_SERVICES=1 (a skipped suite is a failure there).
func serviceRegistry(t testing.TB) (addr string, auth authn.Authenticator) {
	t.Helper()
	addr = os.Getenv("MODELGATE_TEST_REGISTRY")
	if addr == "" {
		if os.Getenv("CI") != "" && os.Getenv("MODELGATE_REQUIRE_SERVICES") == "1" {
			t.Fatal("MODELGATE_TEST_REGISTRY is not set: .ci/services.sh must start docker-registry in CI")
		}
		t.Skip("MODELGATE_TEST_REGISTRY not set (source .ci/services.sh to start docker-registry)")
	}
	return addr, authn.FromConfig(authn.AuthConfig{
		Username: os.Getenv("MODELGATE_TEST_REGISTRY_USER"),
		Password: os.Getenv("MODELGATE_TEST_REGISTRY_PASSWORD"),
	})
}

var prefixSeq atomic.Int64

// uniquePrefix names a fresh repository prefix on the shared registry
// server, so each store a test opens starts empty.
func uniquePrefix(t testing.TB) string {
	return fmt.Sprintf("mgtest-%d-%d", os.Getpid(), prefixSeq.Add(1))
}

// TestRemoteConformanceDockerRegistry runs the suite against the real
// registry server through the retry wrapper, as openStore builds it:
// docker-registry 2.8 answers 500 to a HEAD of a blob that concurrent
// uploads are committing (seen in the ConcurrentWriters subtest), a
// transient failure the wrapper absorbs.
func TestRemoteConformanceDockerRegistry(t *testing.T) {
	addr, auth := serviceRegistry(t)
	storetest.Run(t, func(t *testing.T) registry.Store {
		return registry.NewRetry(openRemote(t, addr+"/"+uniquePrefix(t), registry.WithRemoteAuth(auth)), registry.RetryOptions{Initial: 20 * time.Millisecond})
	})
}

// TestRemoteDockerRegistryRefusesBadCredentials: the server really checks
// basic auth, and a refusal is errkind.Unauthorized (exit code 4).
func TestRemoteDockerRegistryRefusesBadCredentials(t *testing.T) {
	addr, _ := serviceRegistry(t)
	r := openRemote(t, addr+"/"+uniquePrefix(t), registry.WithRemoteAuth(authn.FromConfig(authn.AuthConfig{Username: "nobody", Password: "wrong"})))
	_, err := r.Tags(t.Context(), "podcast/shows")
	if err == nil {
		t.Fatal("listing with wrong credentials succeeded")
	}
	if !strings.Contains(err.Error(), "401") && !strings.Contains(strings.ToLower(err.Error()), "unauthorized") {
		t.Errorf("error does not say unauthorised: %v", err)
	}
}

// countingTransport counts requests by method (for benchmarks and request
// budgets).
type countingTransport struct {
	inner http.RoundTripper
	n     atomic.Int64
	bytes atomic.Int64
}

func (c *countingTransport) RoundTrip(req *http.Request) (*http.Response, error) {
	c.n.Add(1)
	if req.ContentLength > 0 {
		c.bytes.Add(req.ContentLength)
	}
	return c.inner.RoundTrip(req)
}
