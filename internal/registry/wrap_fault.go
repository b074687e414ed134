package registry

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"sync"
	"sync/atomic"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
)

// FaultPlan says which calls of a faulty store fail. Counts are 1-based
// and deterministic; zero disables a fault.
type FaultPlan struct {
	// FailEvery: every FailEvery-th call (any method) fails with a
	// transient error before it reaches the store.
	FailEvery int
	// TearEvery: every TearEvery-th PutBlob passes on only the first half
	// of the body and then fails transiently, as a dropped connection
	// would; the store must keep nothing of it.
	TearEvery int
	// FlipEvery: every FlipEvery-th PutBlob flips one bit of the body it
	// passes on, as bad memory or a bad NIC would; the store must refuse it
	// (ErrDigestMismatch).
	FlipEvery int
}

// faultyStore injects the faults of a FaultPlan (for tests: restic's
// backend tests wrap their backends the same way).
type faultyStore struct {
	s                Store
	p                FaultPlan
	calls, puts      atomic.Int64
	failed, tornPuts atomic.Int64
}

// NewFaulty wraps s with fault injection. The result has exactly the
// optional abilities of s; their calls count and fail like the others.
func NewFaulty(s Store, p FaultPlan) Store {
	f := &faultyStore{s: s, p: p}
	var (
		sw TagSwapper
		ml ManifestLister
		sc Scrubber
	)
	if _, ok := s.(TagSwapper); ok {
		sw = faultySwapper{f}
	}
	if _, ok := s.(ManifestLister); ok {
		ml = faultyLister{f}
	}
	if _, ok := s.(Scrubber); ok {
		sc = faultyScrubber{f}
	}
	var dl wrapDeleter
	if _, ok := s.(Deleter); ok {
		dl = faultyDeleter{f}
	}
	return compose(f, sw, ml, sc, dl)
}

// Unwrap returns the wrapped store.
func (f *faultyStore) Unwrap() Store { return f.s }
func (f *faultyStore) self() Store   { return f }

var errInjected = errors.New("injected fault")

func (f *faultyStore) fail(op string) error {
	n := f.calls.Add(1)
	if f.p.FailEvery > 0 && n%int64(f.p.FailEvery) == 0 {
		f.failed.Add(1)
		return fmt.Errorf("%s: call %d: %w: %w", op, n, ErrTransient, errInjected)
	}
	return nil
}

func (f *faultyStore) String() string { return f.s.String() }

func (f *faultyStore) Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error) {
	if err := f.fail("resolve"); err != nil {
		return v1.Descriptor{}, err
	}
	return f.s.Resolve(ctx, repo, tag)
}

func (f *faultyStore) Manifest(ctx context.Context, repo string, dgst v1.Hash) ([]byte, v1.Descriptor, error) {
	if err := f.fail("manifest"); err != nil {
		return nil, v1.Descriptor{}, err
	}
	return f.s.Manifest(ctx, repo, dgst)
}

func (f *faultyStore) PutManifest(ctx context.Context, repo string, mt types.MediaType, raw []byte) (v1.Descriptor, error) {
	if err := f.fail("put manifest"); err != nil {
		return v1.Descriptor{}, err
	}
	return f.s.PutManifest(ctx, repo, mt, raw)
}

func (f *faultyStore) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	if err := f.fail("blob"); err != nil {
		return nil, err
	}
	return f.s.Blob(ctx, repo, dgst)
}

func (f *faultyStore) StatBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	if err := f.fail("stat blob"); err != nil {
		return 0, err
	}
	return f.s.StatBlob(ctx, repo, dgst)
}

func (f *faultyStore) PutBlob(ctx context.Context, repo string, dgst v1.Hash, size int64, r io.Reader) error {
	if err := f.fail("put blob"); err != nil {
		return err
	}
	n := f.puts.Add(1)
	switch {
	case f.p.TearEvery > 0 && n%int64(f.p.TearEvery) == 0:
		f.tornPuts.Add(1)
		torn := &tornReader{r: io.LimitReader(r, size/2)}
		err := f.s.PutBlob(ctx, repo, dgst, size, torn)
		if err == nil {
			return fmt.Errorf("put blob: torn upload of %s was accepted by the store", dgst)
		}
		return fmt.Errorf("put blob %s: torn after %d bytes: %w: %w", dgst, size/2, ErrTransient, errInjected)
	case f.p.FlipEvery > 0 && n%int64(f.p.FlipEvery) == 0:
		b, err := io.ReadAll(io.LimitReader(r, size))
		if err != nil {
			return err
		}
		if len(b) > 0 {
			b[len(b)/2] ^= 0x10
		}
		return f.s.PutBlob(ctx, repo, dgst, size, bytes.NewReader(b))
	}
	return f.s.PutBlob(ctx, repo, dgst, size, r)
}

// tornReader ends with a connection-style error instead of io.EOF.
type tornReader struct{ r io.Reader }

func (t *tornReader) Read(p []byte) (int, error) {
	n, err := t.r.Read(p)
	if err == io.EOF {
		return n, io.ErrUnexpectedEOF
	}
	return n, err
}

func (f *faultyStore) Tag(ctx context.Context, repo, tag string, desc v1.Descriptor) error {
	if err := f.fail("tag"); err != nil {
		return err
	}
	return f.s.Tag(ctx, repo, tag, desc)
}

func (f *faultyStore) Repositories(ctx context.Context) ([]string, error) {
	if err := f.fail("repositories"); err != nil {
		return nil, err
	}
	return f.s.Repositories(ctx)
}

func (f *faultyStore) Tags(ctx context.Context, repo string) ([]string, error) {
	if err := f.fail("tags"); err != nil {
		return nil, err
	}
	return f.s.Tags(ctx, repo)
}

func (f *faultyStore) Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) ([]v1.Descriptor, error) {
	if err := f.fail("referrers"); err != nil {
		return nil, err
	}
	return f.s.Referrers(ctx, repo, subject, artifactType)
}

type faultySwapper struct{ f *faultyStore }

func (w faultySwapper) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	if err := w.f.fail("swap tag"); err != nil {
		return err
	}
	return w.f.s.(TagSwapper).SwapTag(ctx, repo, tag, old, desc)
}

type faultyLister struct{ f *faultyStore }

func (w faultyLister) Manifests(ctx context.Context, repo string) ([]v1.Descriptor, error) {
	if err := w.f.fail("manifests"); err != nil {
		return nil, err
	}
	return w.f.s.(ManifestLister).Manifests(ctx, repo)
}

type faultyScrubber struct{ f *faultyStore }

func (w faultyScrubber) Scrub(ctx context.Context, referenced map[v1.Hash]bool) ([]Finding, error) {
	if err := w.f.fail("scrub"); err != nil {
		return nil, err
	}
	return w.f.s.(Scrubber).Scrub(ctx, referenced)
}

// FaultyTransport is an http.RoundTripper that injects network faults
// below a remote store (for tests). It considers the requests Match
// accepts (all when nil). Failures and drops are drawn from a generator
// seeded with Seed (deterministic for a given order of requests; periodic
// faults would hit every retry of a multi-request operation at the same
// step); flips count successful GETs, 1-based.
type FaultyTransport struct {
	Inner http.RoundTripper
	// Seed seeds the fault generator.
	Seed uint64
	// FailRate: the share of requests answered 503 without reaching the
	// server.
	FailRate float64
	// DropRate: the share of requests that reach the server, which acts on
	// them, but whose answer is lost (a connection reset): the client cannot
	// tell whether a write happened.
	DropRate float64
	// FlipEvery: every FlipEvery-th successful GET has one bit of its body
	// flipped in transit (0: never).
	FlipEvery int
	// Match selects the requests that count.
	Match func(*http.Request) bool

	mu      sync.Mutex
	rng     *rand.Rand
	n, gets atomic.Int64
	// Failed and Dropped count the faults injected.
	Failed, Dropped atomic.Int64
}

func (ft *FaultyTransport) draw() (fail, drop bool) {
	ft.mu.Lock()
	defer ft.mu.Unlock()
	if ft.rng == nil {
		ft.rng = rand.New(rand.NewPCG(ft.Seed, 0x6661756c74))
	}
	x := ft.rng.Float64()
	return x < ft.FailRate, x >= ft.FailRate && x < ft.FailRate+ft.DropRate
}

// RoundTrip implements http.RoundTripper.
func (ft *FaultyTransport) RoundTrip(req *http.Request) (*http.Response, error) {
	if ft.Match != nil && !ft.Match(req) {
		return ft.Inner.RoundTrip(req)
	}
	n := ft.n.Add(1)
	fail, drop := ft.draw()
	if fail {
		ft.Failed.Add(1)
		if req.Body != nil {
			req.Body.Close()
		}
		return &http.Response{StatusCode: http.StatusServiceUnavailable, Status: "503 Service Unavailable (injected)",
			Header: http.Header{"Content-Type": {"text/plain"}}, Body: io.NopCloser(bytes.NewReader([]byte("injected fault"))),
			Request: req, ProtoMajor: 1, ProtoMinor: 1}, nil
	}
	resp, err := ft.Inner.RoundTrip(req)
	if err != nil {
		return resp, err
	}
	if drop {
		ft.Dropped.Add(1)
		io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		return nil, fmt.Errorf("request %d: %w (injected: the answer was lost)", n, errConnReset)
	}
	if req.Method == http.MethodGet && resp.StatusCode == http.StatusOK && ft.FlipEvery > 0 {
		if g := ft.gets.Add(1); g%int64(ft.FlipEvery) == 0 {
			b, rerr := io.ReadAll(resp.Body)
			resp.Body.Close()
			if rerr != nil {
				return nil, rerr
			}
			if len(b) > 0 {
				b[len(b)/2] ^= 0x01
			}
			resp.Body = io.NopCloser(bytes.NewReader(b))
		}
	}
	return resp, nil
}

// errConnReset stands for a connection reset (syscall.ECONNRESET is
// what IsTransient recognises).
var errConnReset = fmt.Errorf("connection reset: %w", ErrTransient)
