package web

import (
	"context"
	"fmt"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"

	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// BenchmarkServePages times the heaviest pages over the demo store: the
// tag list (every tag's release log verified) and a candidate (its gate
// report, approvals judged).
func BenchmarkServePages(b *testing.B) {
	f := demoStore(b)
	s := newServer(b, f.store, Options{Policies: []*policy.Policy{f.policy}})
	for _, p := range []struct{ name, path string }{
		{"tags", "/"}, {"candidates", "/candidates"}, {"candidate", "/candidates/promo-scorer@" + f.better},
		{"report", "/reports/promo-scorer@" + f.reports[f.better]}, {"artifact", "/artifacts/promo-scorer@" + f.better},
	} {
		b.Run(p.name, func(b *testing.B) {
			for b.Loop() {
				if r := get(b, s, p.path); r.status != http.StatusOK {
					b.Fatalf("%s: %d", p.path, r.status)
				}
			}
		})
	}
}

// BenchmarkServePagesRegistry times the same pages over a registry on
// loopback: Debian's docker-registry when .ci/services.sh started it
// (MODELGATE_TEST_REGISTRY), else go-containerregistry's in-memory one.
// The store is wrapped as modelgate view wraps a remote store
// (registry.NewMemo). "first" is a fresh server's first view of each page
// (what every view cost before manifests and blobs were kept in memory);
// "again" every later view. requests/op counts the requests a page sends
// the registry.
func BenchmarkServePagesRegistry(b *testing.B) {
	f := demoStore(b)
	ctx := context.Background()
	addr, auth := os.Getenv("MODELGATE_TEST_REGISTRY"), authn.Anonymous
	if addr != "" {
		auth = authn.FromConfig(authn.AuthConfig{Username: os.Getenv("MODELGATE_TEST_REGISTRY_USER"), Password: os.Getenv("MODELGATE_TEST_REGISTRY_PASSWORD")})
	} else {
		srv := httptest.NewServer(ggcrregistry.New(ggcrregistry.Logger(log.New(io.Discard, "", 0))))
		b.Cleanup(srv.Close)
		addr = strings.TrimPrefix(srv.URL, "http://")
	}
	loc := fmt.Sprintf("%s/mgweb-%d-%d", addr, os.Getpid(), time.Now().UnixNano())
	w, err := registry.OpenRemote(loc, registry.WithRemoteAuth(auth))
	if err != nil {
		b.Fatal(err)
	}
	if _, err := registry.CopyAll(ctx, f.store, registry.NewRetry(w, registry.RetryOptions{}), registry.CopyOptions{}); err != nil {
		b.Fatal(err)
	}
	// A fresh server reads through a fresh store, as a new modelgate view
	// process does; requests/op counts what one page sends the registry.
	rl := &requestLog{n: map[string]int{}}
	fresh := func() *Server {
		r, err := registry.OpenRemote(loc, registry.WithRemoteAuth(auth), registry.WithRemoteTransport(rl))
		if err != nil {
			b.Fatal(err)
		}
		return newServer(b, registry.NewMemo(registry.NewRetry(r, registry.RetryOptions{}), 64<<20), Options{Policies: []*policy.Policy{f.policy}})
	}
	requests := func(b *testing.B) {
		total := 0
		for _, n := range rl.reset() {
			total += n
		}
		b.ReportMetric(float64(total)/float64(b.N), "requests/op")
	}
	pages := []struct{ name, path string }{
		{"tags", "/"}, {"candidates", "/candidates"}, {"candidate", "/candidates/promo-scorer@" + f.better},
		{"report", "/reports/promo-scorer@" + f.reports[f.better]}, {"artifact", "/artifacts/promo-scorer@" + f.better},
	}
	for _, p := range pages {
		b.Run(p.name+"/first", func(b *testing.B) {
			rl.reset()
			for b.Loop() {
				if r := get(b, fresh(), p.path); r.status != http.StatusOK {
					b.Fatalf("%s: %d", p.path, r.status)
				}
			}
			requests(b)
		})
		s := fresh()
		get(b, s, p.path)
		b.Run(p.name+"/again", func(b *testing.B) {
			rl.reset()
			for b.Loop() {
				if r := get(b, s, p.path); r.status != http.StatusOK {
					b.Fatalf("%s: %d", p.path, r.status)
				}
			}
			requests(b)
		})
	}
}
