package web

import (
	"context"
	"fmt"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"

	"github.com/google/go-containerregistry/pkg/authn"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	"github.com/google/go-containerregistry/pkg/v1/remote"

	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

// requestLog counts the requests a store sends, by method and path.
type requestLog struct {
	mu sync.Mutex
	n  map[string]int
}

func (l *requestLog) RoundTrip(r *http.Request) (*http.Response, error) {
	l.mu.Lock()
	l.n[r.Method+" "+r.URL.Path]++
	l.mu.Unlock()
	return remote.DefaultTransport.RoundTrip(r)
}

func (l *requestLog) reset() map[string]int {
	l.mu.Lock()
	defer l.mu.Unlock()
	n := l.n
	l.n = map[string]int{}
	return n
}

// TestServeRegistryFresh: the view of a registry store, wrapped as
// modelgate view wraps it (registry.NewMemo), shows on the next page what
// another process wrote after the previous page: an approval and a
// promotion. And a page seen again asks the registry each question once.
// Both referrer schemes of the distribution spec v1.1: the referrers API
// (go-containerregistry's in-memory registry has it) and the tag fallback
// (the same registry with the API answering 404 as docker-registry 2.8
// does).
func TestServeRegistryFresh(t *testing.T) {
	f := demoStore(t)
	for _, mode := range []string{"referrers API", "tag fallback"} {
		t.Run(mode, func(t *testing.T) {
			ctx := context.Background()
			var h http.Handler = ggcrregistry.New(ggcrregistry.Logger(log.New(io.Discard, "", 0)))
			if mode == "tag fallback" {
				inner := h
				h = http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
					if strings.Contains(r.URL.Path, "/referrers/") {
						http.NotFound(w, r)
						return
					}
					inner.ServeHTTP(w, r)
				})
			}
			srv := httptest.NewServer(h)
			t.Cleanup(srv.Close)
			loc := strings.TrimPrefix(srv.URL, "http://") + "/fresh"
			writer, err := registry.OpenRemote(loc, registry.WithRemoteAuth(authn.Anonymous))
			if err != nil {
				t.Fatal(err)
			}
			if _, err := registry.CopyAll(ctx, f.store, writer, registry.CopyOptions{}); err != nil {
				t.Fatal(err)
			}
			rl := &requestLog{n: map[string]int{}}
			reader, err := registry.OpenRemote(loc, registry.WithRemoteAuth(authn.Anonymous), registry.WithRemoteTransport(rl))
			if err != nil {
				t.Fatal(err)
			}
			s := newServer(t, registry.NewMemo(registry.NewRetry(reader, registry.RetryOptions{}), 64<<20), Options{Policies: []*policy.Policy{f.policy}})

			candPath := "/candidates/promo-scorer@" + f.better
			for _, p := range []string{"/", "/candidates", candPath, "/tags/promo-scorer:prod"} {
				mustGet(t, s, p)
				rl.reset()
				mustGet(t, s, p)
				for req, n := range rl.reset() {
					if n > 1 {
						t.Errorf("%s seen again: %s sent %d times", p, req, n)
					}
				}
			}
			if page := mustGet(t, s, candPath); !strings.Contains(page, "no approval yet from sam") {
				t.Fatal("before sam approves, the candidate page does not say sam has not approved")
			}

			// Another process approves: the next page shows it.
			cand, _ := registry.ParseDigest(f.better)
			rd, _ := registry.ParseDigest(f.reports[f.better])
			prod := registry.Ref{Repository: "promo-scorer", Tag: "prod"}
			if _, err := release.Approve(ctx, writer, release.ApproveRequest{Candidate: cand, Target: prod, PolicyDigest: f.policy.Digest(),
				Report: rd, Key: f.keys["sam"], Comment: "fresh view check"}); err != nil {
				t.Fatal(err)
			}
			page := mustGet(t, s, candPath)
			if strings.Contains(page, "no approval yet from sam") || !strings.Contains(page, "fresh view check") {
				t.Error("the candidate page does not show sam's approval made after the previous page")
			}

			// Another process promotes: the tag's page shows the release.
			reason := fmt.Sprintf("fresh view check, %s", mode)
			if strings.Contains(mustGet(t, s, "/tags/promo-scorer:prod"), reason) {
				t.Fatal("the tag page shows the release before it happened")
			}
			if _, err := release.Promote(ctx, writer, release.PromoteRequest{Candidate: cand, Target: prod, Policy: f.policy,
				Key: f.keys["ops"], Reason: reason}); err != nil {
				t.Fatal(err)
			}
			if !strings.Contains(mustGet(t, s, "/tags/promo-scorer:prod"), reason) {
				t.Error("the tag page does not show the promotion made after the previous page")
			}
		})
	}
}
