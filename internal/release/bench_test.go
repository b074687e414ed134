package release

import (
	"context"
	"fmt"
	"io"
	"log"
	"net/http/httptest"
	"strings"
	"sync/atomic"
	"testing"

	"github.com/google/go-containerregistry/pkg/authn"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// counting is a store that counts every call (store round trips).
type counting struct {
	s registry.Store
	n atomic.Int64
}

var _ registry.TagSwapper = (*counting)(nil)

func (c *counting) String() string { return c.s.String() }
func (c *counting) Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error) {
	c.n.Add(1)
	return c.s.Resolve(ctx, repo, tag)
}
func (c *counting) Manifest(ctx context.Context, repo string, d v1.Hash) ([]byte, v1.Descriptor, error) {
	c.n.Add(1)
	return c.s.Manifest(ctx, repo, d)
}
func (c *counting) PutManifest(ctx context.Context, repo string, mt types.MediaType, raw []byte) (v1.Descriptor, error) {
	c.n.Add(1)
	return c.s.PutManifest(ctx, repo, mt, raw)
}
func (c *counting) Blob(ctx context.Context, repo string, d v1.Hash) (io.ReadCloser, error) {
	c.n.Add(1)
	return c.s.Blob(ctx, repo, d)
}
func (c *counting) StatBlob(ctx context.Context, repo string, d v1.Hash) (int64, error) {
	c.n.Add(1)
	return c.s.StatBlob(ctx, repo, d)
}
func (c *counting) PutBlob(ctx context.Context, repo string, d v1.Hash, size int64, r io.Reader) error {
	c.n.Add(1)
	return c.s.PutBlob(ctx, repo, d, size, r)
}
func (c *counting) Tag(ctx context.Context, repo, tag string, desc v1.Descriptor) error {
	c.n.Add(1)
	return c.s.Tag(ctx, repo, tag, desc)
}
func (c *counting) Repositories(ctx context.Context) ([]string, error) {
	c.n.Add(1)
	return c.s.Repositories(ctx)
}
func (c *counting) Tags(ctx context.Context, repo string) ([]string, error) {
	c.n.Add(1)
	return c.s.Tags(ctx, repo)
}
func (c *counting) Referrers(ctx context.Context, repo string, s v1.Hash, at string) ([]v1.Descriptor, error) {
	c.n.Add(1)
	return c.s.Referrers(ctx, repo, s, at)
}
func (c *counting) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	c.n.Add(1)
	return c.s.(registry.TagSwapper).SwapTag(ctx, repo, tag, old, desc)
}

// chain prepares store with a release log of n records on
// tiny-encoder:prod: an initial record adopting model a and releasing b,
// then n-1 rollbacks alternating between them. It returns a and b.
func chain(tb testing.TB, store registry.Store, n int) (a, b v1.Hash) {
	tb.Helper()
	ctx := context.Background()
	dir := tb.TempDir()
	var ds []v1.Hash
	for i := range 2 {
		m := fixture.EncoderModel()
		m.Spec.Name = fmt.Sprintf("tiny-listener-encoder-%d", i)
		p := dir + "/" + m.Spec.Name
		if err := modeldir.Write(p, m); err != nil {
			tb.Fatal(err)
		}
		res, err := artifact.PushModelDir(ctx, store, p, registry.Ref{Repository: testRepo, Tag: fmt.Sprintf("v%d", i)}, artifact.Options{})
		if err != nil {
			tb.Fatal(err)
		}
		d, _ := registry.ParseDigest(res.Digest)
		ds = append(ds, d)
	}
	a, b = ds[0], ds[1]
	_, ad, _ := store.Manifest(ctx, testRepo, a)
	if err := store.Tag(ctx, testRepo, "prod", ad); err != nil {
		tb.Fatal(err)
	}
	if _, err := Initial(ctx, store, InitialRequest{Target: prodRef, To: b, User: "bench"}); err != nil {
		tb.Fatal(err)
	}
	for i := 1; i < n; i++ {
		to := a
		if i%2 == 0 {
			to = b
		}
		if _, err := Rollback(ctx, store, RollbackRequest{Target: prodRef, To: &to, Reason: "build the chain", User: "bench"}); err != nil {
			tb.Fatal(err)
		}
	}
	return a, b
}

// TestRollbackStoreOpsConstant: a rollback makes the same number of store
// calls whatever the length of the log (counted, not timed).
func TestRollbackStoreOpsConstant(t *testing.T) {
	ops := func(n int) (plain, to int64) {
		l, err := registry.OpenLocal(t.TempDir())
		if err != nil {
			t.Fatal(err)
		}
		c := &counting{s: l}
		a, _ := chain(t, c, n)
		c.n.Store(0)
		if _, err := Rollback(context.Background(), c, RollbackRequest{Target: prodRef, Reason: "plain", User: "t"}); err != nil {
			t.Fatal(err)
		}
		plain = c.n.Load()
		cur, _ := l.Resolve(context.Background(), testRepo, "prod")
		target := a
		if cur.Digest == a {
			target = chainOther(t, l, a)
		}
		c.n.Store(0)
		if _, err := Rollback(context.Background(), c, RollbackRequest{Target: prodRef, To: &target, Reason: "to", User: "t"}); err != nil {
			t.Fatal(err)
		}
		return plain, c.n.Load()
	}
	p3, t3 := ops(3)
	p100, t100 := ops(100)
	if p3 != p100 || t3 != t100 {
		t.Errorf("store calls of a rollback: plain %d with 3 records, %d with 100; --to %d vs %d", p3, p100, t3, t100)
	}
	t.Logf("store calls per rollback: plain %d, --to %d", p3, t3)
}

// chainOther returns the released model of the chain that is not a.
func chainOther(t *testing.T, s registry.Store, a v1.Hash) v1.Hash {
	d, err := s.Resolve(context.Background(), testRepo, "v1")
	if err != nil {
		t.Fatal(err)
	}
	if d.Digest == a {
		d, _ = s.Resolve(context.Background(), testRepo, "v0")
	}
	return d.Digest
}

// memRemote is a Remote store on go-containerregistry's in-memory
// registry (pkg/registry) over loopback HTTP: per-call cost does not
// depend on how much the registry holds, unlike the local store, which
// rewrites one index.json holding every manifest.
func memRemote(tb testing.TB) registry.Store {
	h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	srv := httptest.NewServer(h)
	tb.Cleanup(srv.Close)
	r, err := registry.OpenRemote(strings.TrimPrefix(srv.URL, "http://")+"/bench", registry.WithRemoteAuth(authn.Anonymous))
	if err != nil {
		tb.Fatal(err)
	}
	return r
}

type benchChain struct {
	store registry.Store
	a, b  v1.Hash
}

// BenchmarkRollback times one rollback (--to, alternating between two
// released models) with 1 and with 10,000 records already in the log, on
// the in-memory registry (per-call cost independent of store size) and on
// the local store (whose every call reads index.json, which grows with
// the number of manifests). The log grows by one record per iteration.
func BenchmarkRollback(b *testing.B) {
	parent := b
	chains := map[string]*benchChain{}
	for _, sc := range []struct {
		store string
		n     int
	}{{"remote", 1}, {"remote", 10000}, {"local", 1}, {"local", 1000}} {
		b.Run(fmt.Sprintf("%s/records=%d", sc.store, sc.n), func(b *testing.B) {
			key := fmt.Sprintf("%s/%d", sc.store, sc.n)
			bc, ok := chains[key]
			if !ok {
				var s registry.Store
				if sc.store == "remote" {
					s = memRemote(parent)
				} else {
					l, err := registry.OpenLocal(parent.TempDir())
					if err != nil {
						b.Fatal(err)
					}
					s = l
				}
				x, y := chain(parent, s, sc.n)
				bc = &benchChain{store: s, a: x, b: y}
				chains[key] = bc
			}
			ctx := context.Background()
			cur, err := bc.store.Resolve(ctx, testRepo, "prod")
			if err != nil {
				b.Fatal(err)
			}
			at := cur.Digest
			b.ResetTimer()
			for range b.N {
				to := bc.a
				if at == bc.a {
					to = bc.b
				}
				if _, err := Rollback(ctx, bc.store, RollbackRequest{Target: prodRef, To: &to, Reason: "bench", User: "bench"}); err != nil {
					b.Fatal(err)
				}
				at = to
			}
		})
	}
}
