package registry_test

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"io"
	"log"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"

	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

func digestOf(b []byte) v1.Hash {
	s := sha256.Sum256(b)
	return v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(s[:])}
}

func randomBytes(n int, seed uint64) []byte {
	r := rand.New(rand.NewPCG(seed, 1))
	b := make([]byte, n)
	for i := range b {
		b[i] = byte(r.Uint32())
	}
	return b
}

// countingRegistry is an in-memory OCI registry (go-containerregistry's
// pkg/registry, which serves Range on blob GETs) behind a handler that
// counts the blob body bytes it sends and can corrupt ranged answers.
type countingRegistry struct {
	srv     *httptest.Server
	blobOut atomic.Int64
	blobGet atomic.Int64 // blob GET requests
	flip    atomic.Bool  // flip one byte of every 206 answer
}

func newCountingRegistry(t *testing.T) *countingRegistry {
	t.Helper()
	c := &countingRegistry{}
	inner := ggcrregistry.New(ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	c.srv = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.Method == http.MethodGet && strings.Contains(r.URL.Path, "/blobs/") {
			rec := httptest.NewRecorder()
			inner.ServeHTTP(rec, r)
			body := rec.Body.Bytes()
			if rec.Code == http.StatusPartialContent && c.flip.Load() && len(body) > 0 {
				body = append([]byte(nil), body...)
				body[len(body)/2] ^= 1
			}
			for k, v := range rec.Header() {
				w.Header()[k] = v
			}
			w.WriteHeader(rec.Code)
			c.blobOut.Add(int64(len(body))) // before the client can see them
			c.blobGet.Add(1)
			w.Write(body)
			return
		}
		inner.ServeHTTP(w, r)
	}))
	t.Cleanup(c.srv.Close)
	return c
}

func (c *countingRegistry) open(t *testing.T) registry.Store {
	t.Helper()
	s, err := registry.OpenRemote(strings.TrimPrefix(c.srv.URL, "http://") + "/cache")
	if err != nil {
		t.Fatal(err)
	}
	return registry.NewRetry(s, registry.RetryOptions{})
}

// TestBlobCacheVerifies: a cached blob is served only when its bytes hash
// to its name; a damaged or planted copy is removed and refetched.
func TestBlobCacheVerifies(t *testing.T) {
	ctx := context.Background()
	reg := newCountingRegistry(t)
	s := reg.open(t)
	blob := randomBytes(300<<10, 1)
	d := digestOf(blob)
	if err := s.PutBlob(ctx, "r", d, int64(len(blob)), bytes.NewReader(blob)); err != nil {
		t.Fatal(err)
	}
	c, err := registry.OpenBlobCache(t.TempDir(), 1<<30)
	if err != nil {
		t.Fatal(err)
	}
	cs := registry.NewCached(s, c)
	read := func() []byte {
		t.Helper()
		rc, err := cs.Blob(ctx, "r", d)
		if err != nil {
			t.Fatal(err)
		}
		defer rc.Close()
		b, err := io.ReadAll(rc)
		if err != nil {
			t.Fatal(err)
		}
		return b
	}
	if !bytes.Equal(read(), blob) || reg.blobOut.Load() != int64(len(blob)) {
		t.Fatalf("first read: %d bytes from the registry, want %d", reg.blobOut.Load(), len(blob))
	}
	if !bytes.Equal(read(), blob) || reg.blobOut.Load() != int64(len(blob)) {
		t.Errorf("second read went to the registry (%d bytes in all)", reg.blobOut.Load())
	}
	// Damage the cached copy: it must be refused, removed and refetched.
	p := filepath.Join(c.Dir(), "blobs", "sha256", d.Hex)
	bad := append([]byte(nil), blob...)
	bad[7] ^= 0x40
	if err := os.WriteFile(p, bad, 0o600); err != nil {
		t.Fatal(err)
	}
	if got := read(); !bytes.Equal(got, blob) {
		t.Fatalf("a damaged cached copy was served")
	}
	if reg.blobOut.Load() != 2*int64(len(blob)) {
		t.Errorf("after damage: %d bytes from the registry, want %d (refetched once)", reg.blobOut.Load(), 2*len(blob))
	}
	// OpenBlobAt and Fetch take the same path.
	if _, _, err := c.Open(d, int64(len(blob))); err != nil {
		t.Errorf("the refetched copy is not in the cache: %v", err)
	}
	if _, _, err := c.Open(d, 5); !errors.Is(err, registry.ErrNotFound) {
		t.Errorf("a copy of the wrong size: %v", err)
	}
}

// TestBlobCacheEvictsAndShares: the cache stays within its bound (least
// recently used go first) and many processes' worth of concurrent
// fetches of one blob leave one good copy.
func TestBlobCacheEvictsAndShares(t *testing.T) {
	ctx := context.Background()
	reg := newCountingRegistry(t)
	s := reg.open(t)
	var ds []v1.Hash
	for i := range 4 {
		b := randomBytes(200<<10, uint64(10+i))
		d := digestOf(b)
		if err := s.PutBlob(ctx, "r", d, int64(len(b)), bytes.NewReader(b)); err != nil {
			t.Fatal(err)
		}
		ds = append(ds, d)
	}
	dir := t.TempDir()
	var wg sync.WaitGroup
	errs := make(chan error, 8)
	for range 8 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			c, err := registry.OpenBlobCache(dir, 1<<30)
			if err == nil {
				var f *os.File
				f, _, err = c.Fetch(ctx, s, "r", ds[0], 200<<10)
				if err == nil {
					f.Close()
				}
			}
			errs <- err
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		if err != nil {
			t.Fatal(err)
		}
	}
	c, _ := registry.OpenBlobCache(dir, 500<<10) // room for two
	for _, d := range ds {
		f, _, err := c.Fetch(ctx, s, "r", d, 200<<10)
		if err != nil {
			t.Fatal(err)
		}
		f.Close()
	}
	var total int64
	ents, _ := os.ReadDir(filepath.Join(dir, "blobs", "sha256"))
	for _, e := range ents {
		fi, _ := e.Info()
		total += fi.Size()
	}
	if total > 500<<10 || len(ents) != 2 {
		t.Errorf("cache holds %d blobs, %d bytes; want 2 within 500 KiB", len(ents), total)
	}
	if !c.Has(ds[3], -1) || !c.Has(ds[2], -1) || c.Has(ds[0], -1) {
		t.Errorf("eviction kept the wrong blobs")
	}
	tmps, _ := filepath.Glob(filepath.Join(dir, "blobs", ".tmp-*"))
	if len(tmps) != 0 {
		t.Errorf("temporary files left: %v", tmps)
	}
}

// TestBlobAtRanges: with block digests, a reader of part of a blob fetches
// only the blocks it reads; a registry serving other bytes for a range
// fails the read with an integrity error, never wrong bytes; a whole read
// ends in the cache, after which nothing is fetched.
func TestBlobAtRanges(t *testing.T) {
	ctx := context.Background()
	reg := newCountingRegistry(t)
	s := reg.open(t)
	blob := randomBytes(1<<20+123, 3)
	d := digestOf(blob)
	if err := s.PutBlob(ctx, "r", d, int64(len(blob)), bytes.NewReader(blob)); err != nil {
		t.Fatal(err)
	}
	bh := registry.NewBlockHasher(int64(len(blob)))
	bh.Write(blob[:1000])
	bh.Write(blob[1000:])
	blocks := bh.Digests()
	if blocks.Size != 64<<10 || len(blocks.SHA256) != 17 || blocks.Check(int64(len(blob))) != nil {
		t.Fatalf("block digests: %d of %d bytes", len(blocks.SHA256), blocks.Size)
	}
	c, _ := registry.OpenBlobCache(t.TempDir(), 1<<30)
	cs := registry.NewCached(s, c)

	b, err := registry.OpenBlobAt(ctx, cs, "r", d, int64(len(blob)), blocks)
	if err != nil {
		t.Fatal(err)
	}
	p := make([]byte, 1000)
	if _, err := b.ReadAt(p, 200_000); err != nil || !bytes.Equal(p, blob[200_000:201_000]) {
		t.Fatalf("ReadAt: %v", err)
	}
	if got := reg.blobOut.Load(); got != 64<<10 {
		t.Errorf("one read in one block fetched %d bytes, want one block (%d)", got, 64<<10)
	}
	b.Close()
	if c.Has(d, -1) {
		t.Errorf("a partly read blob entered the cache")
	}

	// A registry answering ranges with other bytes.
	reg.flip.Store(true)
	b, err = registry.OpenBlobAt(ctx, cs, "r", d, int64(len(blob)), blocks)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := b.ReadAt(p, 500_000); !errors.Is(err, registry.ErrDigestMismatch) || errkind.Of(err) != errkind.Integrity {
		t.Errorf("a corrupted range: %v, want an integrity error", err)
	}
	if _, err := b.ReadAt(p, 0); err == nil {
		t.Errorf("a reader that saw a corrupted range read on")
	}
	b.Close()
	reg.flip.Store(false)

	// Block digests that do not describe the blob: every block checks
	// against them only if the blob is what they say; here one is wrong.
	wrong := *blocks
	wrong.SHA256 = append([]string(nil), blocks.SHA256...)
	wrong.SHA256[3] = strings.Repeat("0", 64)
	b, _ = registry.OpenBlobAt(ctx, cs, "r", d, int64(len(blob)), &wrong)
	if err := b.Whole(); errkind.Of(err) != errkind.Integrity {
		t.Errorf("wrong block digests: %v", err)
	}
	b.Close()

	// Read all: the copy is checked whole and cached.
	before := reg.blobOut.Load()
	b, _ = registry.OpenBlobAt(ctx, cs, "r", d, int64(len(blob)), blocks)
	all := make([]byte, len(blob))
	if _, err := b.ReadAt(all, 0); err != nil || !bytes.Equal(all, blob) {
		t.Fatalf("whole read: %v", err)
	}
	b.Close()
	if got := reg.blobOut.Load() - before; got != int64(len(blob)) {
		t.Errorf("whole read fetched %d bytes, want %d", got, len(blob))
	}
	if !c.Has(d, int64(len(blob))) {
		t.Fatalf("a wholly read blob is not cached")
	}
	before = reg.blobOut.Load()
	b, _ = registry.OpenBlobAt(ctx, cs, "r", d, int64(len(blob)), blocks)
	if _, err := b.ReadAt(all, 0); err != nil || !bytes.Equal(all, blob) || b.Fetched() != 0 || reg.blobOut.Load() != before {
		t.Errorf("a cached blob was fetched again (%v)", err)
	}
	b.Close()
}

func TestParseByteSize(t *testing.T) {
	for in, want := range map[string]int64{"": 0, "1024": 1024, "4G": 4 << 30, "512m": 512 << 20, "3K": 3 << 10} {
		if got, err := registry.ParseByteSize(in); err != nil || got != want {
			t.Errorf("%q: %d, %v; want %d", in, got, err, want)
		}
	}
	for _, in := range []string{"x", "-1", "0", "1.5G", "G"} {
		if _, err := registry.ParseByteSize(in); err == nil {
			t.Errorf("%q accepted", in)
		}
	}
}

// TestMemo: a memo store reads a small blob once and serves it again from
// memory, and keeps the wrapped store's abilities.
func TestMemo(t *testing.T) {
	ctx := context.Background()
	reg := newCountingRegistry(t)
	s := reg.open(t)
	blob := randomBytes(10<<10, 5)
	d := digestOf(blob)
	if err := s.PutBlob(ctx, "r", d, int64(len(blob)), bytes.NewReader(blob)); err != nil {
		t.Fatal(err)
	}
	m := registry.NewMemo(s, 1<<20)
	for range 3 {
		rc, err := m.Blob(ctx, "r", d)
		if err != nil {
			t.Fatal(err)
		}
		b, err := io.ReadAll(rc)
		rc.Close()
		if err != nil || !bytes.Equal(b, blob) {
			t.Fatalf("memo blob: %v", err)
		}
	}
	if got := reg.blobOut.Load(); got != int64(len(blob)) {
		t.Errorf("three reads through the memo fetched %d bytes, want %d (once)", got, len(blob))
	}
	if _, ok := m.(registry.TagSwapper); !ok {
		t.Errorf("the memo store lost the registry's compare-and-swap ability")
	}
}

// TestBlobAtReadAhead: a reader going through a blob in small pieces
// (as a Parquet reader goes through a column chunk page by page) fetches
// growing runs of blocks, not one block per request; a reader that stops
// has fetched at most 16 blocks beyond what it read; a jump back or far
// ahead fetches only the block it reads.
func TestBlobAtReadAhead(t *testing.T) {
	ctx := context.Background()
	reg := newCountingRegistry(t)
	s := reg.open(t)
	blob := randomBytes(64<<10*100, 5) // 100 blocks
	d := digestOf(blob)
	if err := s.PutBlob(ctx, "r", d, int64(len(blob)), bytes.NewReader(blob)); err != nil {
		t.Fatal(err)
	}
	bh := registry.NewBlockHasher(int64(len(blob)))
	bh.Write(blob)
	b, err := registry.OpenBlobAt(ctx, s, "r", d, int64(len(blob)), bh.Digests())
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	gets := reg.blobGet.Load()
	p := make([]byte, 4096)
	const read = 40 << 16 // the first 40 blocks, 4 KiB at a time
	for off := int64(0); off < read; off += int64(len(p)) {
		if _, err := b.ReadAt(p, off); err != nil || !bytes.Equal(p, blob[off:off+int64(len(p))]) {
			t.Fatalf("ReadAt %d: %v", off, err)
		}
	}
	// Runs of 1, 2, 4, 8, 16, 16 blocks after the first: 7 requests.
	if n := reg.blobGet.Load() - gets; n > 8 {
		t.Errorf("40 blocks read in order took %d requests, want at most 8", n)
	}
	if f := b.Fetched(); f < read || f > read+16<<16 {
		t.Errorf("fetched %d bytes for %d read, want at most 16 blocks more", f, read)
	}
	// Far ahead, then back: one block each.
	for _, off := range []int64{90 << 16, 60 << 16} {
		before := b.Fetched()
		if _, err := b.ReadAt(p, off); err != nil || !bytes.Equal(p, blob[off:off+int64(len(p))]) {
			t.Fatalf("ReadAt %d: %v", off, err)
		}
		if got := b.Fetched() - before; got != 64<<10 {
			t.Errorf("a jump to block %d fetched %d bytes, want one block", off>>16, got)
		}
	}
}
