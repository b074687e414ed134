package checks

import (
	"context"
	"fmt"
	"io"
	"log"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/demo/listening"
	"github.com/modelgate/modelgate/internal/registry"
)

// blobCounter is a reverse proxy in front of a registry that counts the
// bytes of blob bodies it passes on, by digest.
type blobCounter struct {
	mu   sync.Mutex
	out  map[string]int64
	reqs map[string]int // GET requests, by digest
}

func (c *blobCounter) requests(digest string) int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.reqs[digest]
}

func (c *blobCounter) bytes(digest string) int64 {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.out[digest]
}

type countingBody struct {
	io.ReadCloser
	c      *blobCounter
	digest string
}

func (b countingBody) Read(p []byte) (int, error) {
	n, err := b.ReadCloser.Read(p)
	b.c.mu.Lock()
	b.c.out[b.digest] += int64(n)
	b.c.mu.Unlock()
	return n, err
}

// countingProxy starts the proxy in front of target (a URL).
func countingProxy(t *testing.T, target string) (*blobCounter, string) {
	t.Helper()
	u, err := url.Parse(target)
	if err != nil {
		t.Fatal(err)
	}
	c := &blobCounter{out: map[string]int64{}, reqs: map[string]int{}}
	rp := httputil.NewSingleHostReverseProxy(u)
	rp.ErrorLog = log.New(io.Discard, "", 0)
	rp.ModifyResponse = func(resp *http.Response) error {
		p := resp.Request.URL.Path
		if resp.Request.Method == http.MethodGet && strings.Contains(p, "/blobs/sha256:") {
			d := p[strings.LastIndex(p, "/")+1:]
			c.mu.Lock()
			c.reqs[d]++
			c.mu.Unlock()
			resp.Body = countingBody{resp.Body, c, d}
		}
		return nil
	}
	srv := httptest.NewServer(rp)
	t.Cleanup(srv.Close)
	return c, strings.TrimPrefix(srv.URL, "http://")
}

// bytesRegistry is the registry under test: Debian's docker-registry that
// .ci/services.sh starts (MODELGATE_TEST_REGISTRY), else the in-memory
// one of go-containerregistry; both serve HTTP Range on blob GETs.
func bytesRegistry(t *testing.T) (target string, auth authn.Authenticator) {
	if addr := os.Getenv("MODELGATE_TEST_REGISTRY"); addr != "" {
		return "http://" + addr, authn.FromConfig(authn.AuthConfig{
			Username: os.Getenv("MODELGATE_TEST_REGISTRY_USER"), Password: os.Getenv("MODELGATE_TEST_REGISTRY_PASSWORD")})
	}
	srv := httptest.NewServer(ggcrregistry.New(ggcrregistry.Logger(log.New(io.Discard, "", 0))))
	t.Cleanup(srv.Close)
	return srv.URL, authn.Anonymous
}

// writeBigHoldout writes n rows for the scorer's inputs (the demo's
// listening model over its vocabulary, as bench/genholdout does) in
// Parquet row groups of 65,536 rows (the writer's default).
func writeBigHoldout(t *testing.T, path string, l *artifact.Loaded, n int) {
	t.Helper()
	w, err := data.CreateHoldout(path, data.HoldoutLayout{Dense: l.Spec.Inputs.Dense})
	if err != nil {
		t.Fatal(err)
	}
	r := rand.New(rand.NewPCG(7, 2))
	lr := rand.New(rand.NewPCG(7, 3))
	lm := listening.Default()
	vocab := l.Vocab
	const chunk = 4096
	batch := make([]data.HoldoutRow, 0, chunk)
	for i := 0; i < n; i += chunk {
		k := min(chunk, n-i)
		indptr, indices, plays := lm.Rows(lr, k, len(vocab))
		batch = batch[:0]
		for j := 0; j < k; j++ {
			row := data.HoldoutRow{RowID: int64(i + j), Dense: map[string][]float32{}, Weight: 1}
			for p := indptr[j]; p < indptr[j+1]; p++ {
				row.Items = append(row.Items, vocab[indices[p]])
				row.Values = append(row.Values, plays[p])
			}
			for _, in := range l.Spec.Inputs.Dense {
				v := make([]float32, in.Size)
				for x := range v {
					v[x] = r.Float32()
				}
				row.Dense[in.Name] = v
			}
			if r.Float64() < 0.12 {
				row.Label = 1
			}
			batch = append(batch, row)
		}
		if err := w.Write(batch...); err != nil {
			w.Abort()
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
}

// TestHoldoutBytes measures what gating a 1M-row holdout on a registry
// downloads, with a byte-counting proxy between modelgate and the
// registry (counts are deterministic: pass/fail):
//   - four shards, each a fresh process without a cache, together read at
//     most 1.3 times the holdout blob (each reads its own row groups, by
//     verified ranged reads, plus the boundary row groups and the footer);
//   - the merge of their results reads none of it;
//   - a full gate reads it once, and a second gate sharing the local blob
//     cache reads none of it.
func TestHoldoutBytes(t *testing.T) {
	if testing.Short() {
		t.Skip("writes and gates a 1M-row holdout")
	}
	ctx := context.Background()
	local := demoScenario(t)
	target, auth := bytesRegistry(t)
	counter, addr := countingProxy(t, target)
	loc := fmt.Sprintf("%s/mgbytes-%d-%d", addr, os.Getpid(), time.Now().UnixNano())
	open := func(cache *registry.BlobCache) registry.Store {
		t.Helper()
		r, err := registry.OpenRemote(loc, registry.WithRemoteAuth(auth))
		if err != nil {
			t.Fatal(err)
		}
		s := registry.NewRetry(r, registry.RetryOptions{})
		if cache != nil {
			s = registry.NewCached(s, cache)
		}
		return s
	}
	store := open(nil)
	if _, err := registry.CopyAll(ctx, local, store, registry.CopyOptions{}); err != nil {
		t.Fatal(err)
	}
	prod, _ := registry.ParseRef("promo-scorer:prod", false) // its dense inputs include the candidate's
	l, err := artifact.Load(ctx, store, prod)
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "big.parquet")
	writeBigHoldout(t, path, l, 1_000_000)
	big := registry.Ref{Repository: "promo-holdout", Tag: "big"}
	if _, err := artifact.PushHoldout(ctx, store, path, big, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
	hold, err := artifact.FetchHoldout(ctx, store, big)
	if err != nil {
		t.Fatal(err)
	}
	dg, size := hold.Layer.Digest.String(), hold.Layer.Size
	hold.Close()
	if hold.Info.Blocks == nil {
		t.Fatalf("the pushed holdout's summary records no block digests")
	}
	t.Logf("holdout: %d rows, %d bytes, %d blocks of %d bytes", hold.Info.Rows, size, len(hold.Info.Blocks.SHA256), hold.Info.Blocks.Size)

	g := gateConfig(t, store, "promo-scorer:cand-worse", "promo-scorer:prod", "promo-scorer.yaml")
	g.Holdout = &big
	g.Config.Holdout.Replicas = 20

	// Four shards, each a fresh store without a cache (separate pods).
	var shards []*ShardResult
	var per []int64
	var perReq []int
	for i := range 4 {
		before, beforeReq := counter.bytes(dg), counter.requests(dg)
		g.Store = open(nil)
		r, err := RunShard(ctx, g, i, 4)
		if err != nil {
			t.Fatal(err)
		}
		per = append(per, counter.bytes(dg)-before)
		perReq = append(perReq, counter.requests(dg)-beforeReq)
		shards = append(shards, r)
	}
	total := counter.bytes(dg)
	t.Logf("4 shards read %v bytes of the holdout blob in %v requests: %d bytes in all, %.3f× its %d bytes", per, perReq, total, float64(total)/float64(size), size)
	if float64(total) > 1.3*float64(size) {
		t.Errorf("4 shards read %d bytes of a %d-byte holdout (%.2f×), want at most 1.3×", total, size, float64(total)/float64(size))
	}
	for i, n := range per {
		if n >= size {
			t.Errorf("shard %d read the whole holdout (%d bytes)", i+1, n)
		}
	}
	g.Store = open(nil)
	g.Shards = shards
	merged, err := Run(ctx, g)
	if err != nil {
		t.Fatal(err)
	}
	if got := counter.bytes(dg) - total; got != 0 {
		t.Errorf("the merge read %d bytes of the holdout, want 0", got)
	}

	// A full gate through a fresh cache, then a second one sharing it.
	cache, err := registry.OpenBlobCache(t.TempDir(), 1<<30)
	if err != nil {
		t.Fatal(err)
	}
	g.Shards = nil
	g.Store = open(cache)
	before := counter.bytes(dg)
	one, err := Run(ctx, g)
	if err != nil {
		t.Fatal(err)
	}
	first := counter.bytes(dg) - before
	g.Store = open(cache)
	two, err := Run(ctx, g)
	if err != nil {
		t.Fatal(err)
	}
	second := counter.bytes(dg) - before - first
	t.Logf("full gate: %d bytes of the holdout; second gate with the cache: %d", first, second)
	if first != size {
		t.Errorf("the first full gate read %d bytes of the holdout, want %d (once)", first, size)
	}
	if second != 0 {
		t.Errorf("the second gate read %d bytes of the holdout, want 0 (the cache holds it)", second)
	}
	if one.Verdict != merged.Verdict || one.Verdict != two.Verdict {
		t.Errorf("verdicts: full %s, merged %s, cached %s", one.Verdict, merged.Verdict, two.Verdict)
	}
	h1, hm := holdoutOf(one), holdoutOf(merged)
	if h1 == nil || hm == nil || !relClose(h1.Test.MeanDiff, hm.Test.MeanDiff, 1e-12) || h1.Candidate.Rows != 1_000_000 || hm.Candidate.Rows != 1_000_000 {
		t.Errorf("the merged shards and the full gate disagree")
	}
}
