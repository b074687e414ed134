package checks

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"runtime"
	"runtime/debug"
	"sort"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/score"
)

// The budget's load memory is the bytes allocated to load and prepare a
// model, counted so that a rerun gives the same number:
//
//   - the model is loaded again from an in-memory copy of the manifests and
//     blobs its first (verified) load read, so the count does not depend on
//     the store (a registry's HTTP buffers, a local directory's file reads)
//     nor on how many repositories the store holds;
//   - that second load runs after the first, so one-time costs of the
//     process (compiling the spec's JSON Schema, filling type caches) are
//     not counted against whichever model happened to load first;
//   - the count is the delta of the runtime's cumulative allocation
//     counter (MemStats.TotalAlloc), not a heap sample: two collections
//     before it empty the sync.Pool caches, the collector is off during
//     it, and GOMAXPROCS is 1 so per-processor pool caches cannot miss or
//     hit by where the goroutine ran.
//
// What is left is the allocation of other goroutines that happen to run in
// the window (none in a gate), a few bytes in practice.

// loadedModel is a model loaded for the gate, with the recorded bytes its
// load read (for the deterministic load-memory count).
type loadedModel struct {
	model *score.Model
	foot  Footprint
	ref   registry.Ref // by digest
	mem   *memStore
}

// loadModel loads and prepares the model ref (by digest) from store,
// recording what it reads.
func loadModel(ctx context.Context, store registry.Store, ref registry.Ref) (*loadedModel, error) {
	rec := &memStore{under: store, manifests: map[string]memManifest{}, blobs: map[string][]byte{}}
	l, err := artifact.Load(ctx, rec, ref)
	if err != nil {
		return nil, err
	}
	m, err := score.Prepare(l)
	if err != nil {
		return nil, err
	}
	rec.under = nil // recording done: from now on it serves from memory
	return &loadedModel{model: m, foot: Measure(l), ref: ref, mem: rec}, nil
}

// loadMemMu serialises load-memory counts (they set process-wide knobs).
var loadMemMu sync.Mutex

// loadBytes counts the bytes allocated to load and prepare the model again
// from its recorded copy (see the comment at the top of this file).
func (lm *loadedModel) loadBytes(ctx context.Context) (int64, error) {
	loadMemMu.Lock()
	defer loadMemMu.Unlock()
	var before, after runtime.MemStats
	runtime.GC()
	runtime.GC()
	gc := debug.SetGCPercent(-1)
	procs := runtime.GOMAXPROCS(1)
	runtime.ReadMemStats(&before)
	l, err := artifact.Load(ctx, lm.mem, lm.ref)
	if err == nil {
		_, err = score.Prepare(l)
	}
	runtime.ReadMemStats(&after)
	runtime.GOMAXPROCS(procs)
	debug.SetGCPercent(gc)
	runtime.KeepAlive(l)
	if err != nil {
		return 0, errkind.New(errkind.Internal, "reloading %s from memory to count its load memory: %v", lm.ref, err)
	}
	return int64(after.TotalAlloc - before.TotalAlloc), nil
}

type memManifest struct {
	raw  []byte
	desc v1.Descriptor
}

// memStore records, while under is set, the manifests and blobs read
// through it; once under is nil it serves only what it recorded. It is
// read-only.
type memStore struct {
	under     registry.Store
	mu        sync.Mutex
	manifests map[string]memManifest // repo@digest
	blobs     map[string][]byte      // digest
	repos     []string
}

func (s *memStore) String() string { return "memory copy" }

func (s *memStore) Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error) {
	if s.under != nil {
		return s.under.Resolve(ctx, repo, tag)
	}
	return v1.Descriptor{}, fmt.Errorf("tag %s:%s: %w", repo, tag, registry.ErrNotFound)
}

func (s *memStore) Manifest(ctx context.Context, repo string, dgst v1.Hash) ([]byte, v1.Descriptor, error) {
	key := repo + "@" + dgst.String()
	if s.under == nil {
		m, ok := s.manifests[key]
		if !ok {
			return nil, v1.Descriptor{}, fmt.Errorf("manifest %s: %w", key, registry.ErrNotFound)
		}
		return m.raw, m.desc, nil
	}
	raw, d, err := s.under.Manifest(ctx, repo, dgst)
	if err != nil {
		return raw, d, err
	}
	s.mu.Lock()
	if _, ok := s.manifests[key]; !ok {
		s.manifests[key] = memManifest{raw: bytes.Clone(raw), desc: d}
		if !contains(s.repos, repo) {
			s.repos = append(s.repos, repo)
			sort.Strings(s.repos)
		}
	}
	s.mu.Unlock()
	return raw, d, nil
}

func (s *memStore) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	if s.under == nil {
		b, ok := s.blobs[dgst.String()]
		if !ok {
			return nil, fmt.Errorf("blob %s: %w", dgst, registry.ErrNotFound)
		}
		return io.NopCloser(bytes.NewReader(b)), nil
	}
	rc, err := s.under.Blob(ctx, repo, dgst)
	if err != nil {
		return nil, err
	}
	return &recordingReader{rc: rc, s: s, key: dgst.String()}, nil
}

// recordingReader keeps a copy of a blob read to its end (a verified read:
// the store's reader fails on a digest mismatch at EOF).
type recordingReader struct {
	rc  io.ReadCloser
	s   *memStore
	key string
	buf bytes.Buffer
}

func (r *recordingReader) Read(p []byte) (int, error) {
	n, err := r.rc.Read(p)
	r.buf.Write(p[:n])
	if err == io.EOF {
		r.s.mu.Lock()
		r.s.blobs[r.key] = r.buf.Bytes()
		r.s.mu.Unlock()
	}
	return n, err
}

func (r *recordingReader) Close() error { return r.rc.Close() }

func (s *memStore) StatBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	if s.under != nil {
		return s.under.StatBlob(ctx, repo, dgst)
	}
	b, ok := s.blobs[dgst.String()]
	if !ok {
		return 0, fmt.Errorf("blob %s: %w", dgst, registry.ErrNotFound)
	}
	return int64(len(b)), nil
}

func (s *memStore) Repositories(ctx context.Context) ([]string, error) {
	if s.under != nil {
		return s.under.Repositories(ctx)
	}
	return s.repos, nil
}

func (s *memStore) Tags(ctx context.Context, repo string) ([]string, error) {
	if s.under != nil {
		return s.under.Tags(ctx, repo)
	}
	return nil, nil
}

func (s *memStore) Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) ([]v1.Descriptor, error) {
	if s.under != nil {
		return s.under.Referrers(ctx, repo, subject, artifactType)
	}
	return nil, nil
}

func (s *memStore) PutManifest(context.Context, string, types.MediaType, []byte) (v1.Descriptor, error) {
	return v1.Descriptor{}, errkind.New(errkind.Internal, "the load-memory copy is read-only")
}

func (s *memStore) PutBlob(context.Context, string, v1.Hash, int64, io.Reader) error {
	return errkind.New(errkind.Internal, "the load-memory copy is read-only")
}

func (s *memStore) Tag(context.Context, string, string, v1.Descriptor) error {
	return errkind.New(errkind.Internal, "the load-memory copy is read-only")
}

func contains(xs []string, x string) bool {
	for _, v := range xs {
		if v == x {
			return true
		}
	}
	return false
}
