package registry_test

import (
	"errors"
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

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
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
	if !strings.Contains(err.Error(), "authentication failed for "+addr) || strings.Contains(err.Error(), "map[") || errkind.Of(err) != errkind.Unauthorized {
		t.Errorf("a wrong password: %v (kind %v); want a plain \"authentication failed for %s\", not authorised", err, errkind.Of(err), addr)
	}
}

// TestRemoteWrongPassword: a registry that checks basic auth (the scheme
// of RFC 7617, answered 401 with a Basic challenge as docker-registry's
// htpasswd mode does) refuses wrong credentials; every operation, the
// catalog included, says "authentication failed for HOST" (exit 4) without
// the registry's raw error details, and a catalog refused to good
// credentials is a registry that does not list, not a failed login.
func TestRemoteWrongPassword(t *testing.T) {
	inner := storetest.NoCatalog(ggcrregistry.New(ggcrregistry.Logger(log.New(io.Discard, "", 0))))
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if u, p, ok := r.BasicAuth(); !ok || u != "ci" || p != "right" {
			w.Header().Set("WWW-Authenticate", `Basic realm="podcasts"`)
			w.Header().Set("Content-Type", "application/json")
			w.WriteHeader(http.StatusUnauthorized)
			_, _ = w.Write([]byte(`{"errors":[{"code":"UNAUTHORIZED","message":"authentication required","detail":[{"Type":"repository","Name":"podcasts/shows","Action":"pull"}]}]}`))
			return
		}
		if r.URL.Path == "/v2/_catalog" {
			w.WriteHeader(http.StatusForbidden)
			return
		}
		inner.ServeHTTP(w, r)
	}))
	t.Cleanup(srv.Close)
	host := strings.TrimPrefix(srv.URL, "http://")
	open := func(pw string) *registry.Remote {
		return openRemote(t, host+"/podcasts", registry.WithRemoteAuth(authn.FromConfig(authn.AuthConfig{Username: "ci", Password: pw})))
	}
	bad := open("wrong")
	ctx := t.Context()
	_, tagsErr := bad.Tags(ctx, "shows")
	_, reposErr := bad.Repositories(ctx)
	blobErr := bad.PutBlob(ctx, "shows", storetest.NewBlob(1, 10).Digest, 10, strings.NewReader("0123456789"))
	for what, err := range map[string]error{"tags": tagsErr, "catalog": reposErr, "blob upload": blobErr} {
		if err == nil || !strings.Contains(err.Error(), "authentication failed for "+host) || strings.Contains(err.Error(), "map[") ||
			errkind.Of(err) != errkind.Unauthorized || errors.Is(err, registry.ErrNoCatalog) {
			t.Errorf("%s with a wrong password: %v (kind %v); want a plain authentication failure, exit 4", what, err, errkind.Of(err))
		}
	}
	_, err := open("right").Repositories(ctx)
	if !errors.Is(err, registry.ErrNoCatalog) || errkind.Of(err) != errkind.Unauthorized {
		t.Errorf("a catalog refused to good credentials: %v (kind %v); want ErrNoCatalog, not authorised", err, errkind.Of(err))
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
