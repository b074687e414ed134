package registry

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Environment variables that place and bound the local blob cache.
const (
	// EnvCache names the cache directory; "off" switches the cache off.
	EnvCache = "MODELGATE_CACHE"
	// EnvCacheSize bounds it: bytes, or a number with a K, M, G or T
	// suffix (powers of 1024).
	EnvCacheSize = "MODELGATE_CACHE_SIZE"
)

// DefaultCacheSize bounds the cache when EnvCacheSize is unset: our own
// choice, room for a few holdouts of our demo's scale (a 1M-row holdout is
// about 60 MB) on a CI runner's disk without taking most of it.
const DefaultCacheSize int64 = 4 << 30

// minCached is the smallest blob the cache keeps: smaller ones (specs,
// summaries, reports) cost a round trip either way.
const minCached = 64 << 10

// BlobCache is a directory of blobs named by their sha256 digest, shared
// by every modelgate process of a user. It trusts nothing it finds there:
//   - a blob is re-hashed every time it is opened; a file whose bytes do
//     not hash to its name (damaged, truncated, planted) is removed and
//     reported as a miss;
//   - a blob enters by a temporary file in the same directory, hashed as
//     it is written, renamed to its name only when the digest and size
//     match, so concurrent processes never see a partial blob and the
//     last rename of identical bytes wins harmlessly;
//   - the directory holds at most its size bound, give or take the blobs
//     being written: after every insert the least recently used blobs
//     (by modification time, which a hit refreshes) are removed until the
//     rest fits. A process reading a blob another one evicts keeps its
//     open file (POSIX unlink semantics).
type BlobCache struct {
	dir string
	max int64
}

// OpenBlobCache opens (creating) a cache directory bounded to max bytes.
func OpenBlobCache(dir string, max int64) (*BlobCache, error) {
	if max <= 0 {
		max = DefaultCacheSize
	}
	if err := os.MkdirAll(filepath.Join(dir, "blobs", "sha256"), 0o700); err != nil {
		return nil, fmt.Errorf("blob cache %s: %w", dir, err)
	}
	return &BlobCache{dir: dir, max: max}, nil
}

// CacheFromEnv opens the cache EnvCache and EnvCacheSize describe: the
// default directory is $XDG_CACHE_HOME/modelgate, else the user's cache
// directory (os.UserCacheDir) plus "modelgate". It returns nil, nil when
// EnvCache is "off" or no cache directory can be found.
func CacheFromEnv() (*BlobCache, error) {
	dir := os.Getenv(EnvCache)
	if dir == "off" {
		return nil, nil
	}
	if dir == "" {
		base := os.Getenv("XDG_CACHE_HOME")
		if base == "" {
			var err error
			if base, err = os.UserCacheDir(); err != nil {
				return nil, nil
			}
		}
		dir = filepath.Join(base, "modelgate")
	}
	max, err := ParseByteSize(os.Getenv(EnvCacheSize))
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "%s: %v", EnvCacheSize, err)
	}
	return OpenBlobCache(dir, max)
}

// ParseByteSize reads "1073741824", "512M", "4G" (powers of 1024); "" is 0.
func ParseByteSize(s string) (int64, error) {
	s = strings.TrimSpace(s)
	if s == "" {
		return 0, nil
	}
	mult := int64(1)
	switch strings.ToUpper(s[len(s)-1:]) {
	case "K":
		mult = 1 << 10
	case "M":
		mult = 1 << 20
	case "G":
		mult = 1 << 30
	case "T":
		mult = 1 << 40
	}
	if mult > 1 {
		s = s[:len(s)-1]
	}
	n, err := strconv.ParseInt(s, 10, 64)
	if err != nil || n <= 0 || n > (1<<62)/mult {
		return 0, fmt.Errorf("%q is not a size in bytes (say 4G, 512M or a number)", s)
	}
	return n * mult, nil
}

// Dir is the cache directory.
func (c *BlobCache) Dir() string { return c.dir }

func (c *BlobCache) path(d v1.Hash) string { return filepath.Join(c.dir, "blobs", "sha256", d.Hex) }

// Open returns the cached blob dgst, re-hashed and positioned at its
// start, and its size. A missing blob, or one whose bytes do not match its
// name or size (size < 0: any), is a miss: an error wrapping ErrNotFound;
// a mismatching file is removed.
func (c *BlobCache) Open(dgst v1.Hash, size int64) (*os.File, int64, error) {
	if dgst.Algorithm != "sha256" || len(dgst.Hex) != 64 {
		return nil, 0, notFound("cached blob %s", dgst)
	}
	p := c.path(dgst)
	fi, err := os.Lstat(p)
	if err != nil || !fi.Mode().IsRegular() || (size >= 0 && fi.Size() != size) {
		if err == nil {
			os.Remove(p)
		}
		return nil, 0, notFound("cached blob %s", dgst)
	}
	f, err := os.Open(p)
	if err != nil {
		return nil, 0, notFound("cached blob %s", dgst)
	}
	h := sha256.New()
	n, err := io.Copy(h, f)
	if err != nil || n != fi.Size() || hex.EncodeToString(h.Sum(nil)) != dgst.Hex {
		f.Close()
		os.Remove(p)
		return nil, 0, notFound("cached blob %s (the cached copy did not match its digest and was removed)", dgst)
	}
	if _, err := f.Seek(0, io.SeekStart); err != nil {
		f.Close()
		return nil, 0, err
	}
	now := time.Now()
	os.Chtimes(p, now, now) // least recently used goes first
	return f, n, nil
}

// Has reports whether a file of that name and size is present (not
// verified: Open verifies).
func (c *BlobCache) Has(dgst v1.Hash, size int64) bool {
	fi, err := os.Lstat(c.path(dgst))
	return err == nil && fi.Mode().IsRegular() && (size < 0 || fi.Size() == size)
}

// temp creates a temporary file in the cache directory.
func (c *BlobCache) temp() (*os.File, error) {
	return os.CreateTemp(filepath.Join(c.dir, "blobs"), ".tmp-")
}

// adopt hashes a complete temporary file of the cache directory and, when
// its bytes are dgst and size long, renames it into place; it removes it
// otherwise. The file stays open for the caller.
func (c *BlobCache) adopt(f *os.File, dgst v1.Hash, size int64) error {
	if _, err := f.Seek(0, io.SeekStart); err != nil {
		os.Remove(f.Name())
		return err
	}
	h := sha256.New()
	n, err := io.Copy(h, f)
	if err == nil && (n != size || hex.EncodeToString(h.Sum(nil)) != dgst.Hex) {
		err = errkind.New(errkind.Integrity, "%w: blob %s: %d bytes hashing to sha256:%s", ErrDigestMismatch, dgst, n, hex.EncodeToString(h.Sum(nil)))
	}
	if err == nil {
		err = os.Rename(f.Name(), c.path(dgst))
	}
	if err != nil {
		os.Remove(f.Name())
		return err
	}
	// Stamp the entry with the clock's full resolution: the time the
	// kernel gives a written file is coarse (a scheduler tick), so blobs
	// entered within one tick would tie and be evicted in any order.
	now := time.Now()
	os.Chtimes(c.path(dgst), now, now)
	c.evict(dgst)
	return nil
}

// evict removes least recently used blobs (and temporary files older than
// a day, left by killed processes) until the cache fits its bound; keep is
// never removed.
func (c *BlobCache) evict(keep v1.Hash) {
	type entry struct {
		path string
		size int64
		mod  time.Time
	}
	var all []entry
	var total int64
	dir := filepath.Join(c.dir, "blobs", "sha256")
	ents, _ := os.ReadDir(dir)
	for _, e := range ents {
		fi, err := e.Info()
		if err != nil || !fi.Mode().IsRegular() {
			continue
		}
		total += fi.Size()
		if e.Name() != keep.Hex {
			all = append(all, entry{filepath.Join(dir, e.Name()), fi.Size(), fi.ModTime()})
		}
	}
	tmps, _ := os.ReadDir(filepath.Join(c.dir, "blobs"))
	for _, e := range tmps {
		if fi, err := e.Info(); err == nil && strings.HasPrefix(e.Name(), ".tmp-") && time.Since(fi.ModTime()) > 24*time.Hour {
			os.Remove(filepath.Join(c.dir, "blobs", e.Name()))
		}
	}
	sort.SliceStable(all, func(i, j int) bool { return all[i].mod.Before(all[j].mod) })
	for _, e := range all {
		if total <= c.max {
			break
		}
		if err := os.Remove(e.path); err == nil || errors.Is(err, fs.ErrNotExist) {
			total -= e.size
		}
	}
}

// Fetch returns the blob dgst (size bytes, < 0 when unknown) from the
// cache, or reads it from s into the cache first. The file is verified
// and positioned at its start; the caller closes it. A blob the cache
// cannot hold (its directory not writable) is an error.
func (c *BlobCache) Fetch(ctx context.Context, s Store, repo string, dgst v1.Hash, size int64) (*os.File, int64, error) {
	if f, n, err := c.Open(dgst, size); err == nil {
		return f, n, nil
	}
	rc, err := s.Blob(ctx, repo, dgst)
	if err != nil {
		return nil, 0, err
	}
	defer rc.Close()
	tmp, err := c.temp()
	if err != nil {
		return nil, 0, fmt.Errorf("blob cache: %w", err)
	}
	n, err := io.Copy(tmp, rc) // the store's reader verifies the digest
	if err == nil && size >= 0 && n != size {
		err = errkind.New(errkind.Integrity, "reading blob %s: %w: got %d bytes, want %d", dgst, ErrDigestMismatch, n, size)
	}
	if err == nil {
		err = c.adopt(tmp, dgst, n)
	} else {
		os.Remove(tmp.Name())
	}
	if err != nil {
		tmp.Close()
		return nil, 0, err
	}
	if _, err := tmp.Seek(0, io.SeekStart); err != nil {
		tmp.Close()
		return nil, 0, err
	}
	return tmp, n, nil
}

// BlobCacher is a Store that keeps blobs in a local BlobCache.
type BlobCacher interface {
	BlobCache() *BlobCache
}

// cachedStore serves blobs from a BlobCache, filling it as blobs are read.
type cachedStore struct {
	Store
	c *BlobCache
}

// NewCached wraps s (a remote store) so that blobs of 64 KiB and more are
// read once per machine: Blob serves a verified cached copy, or streams
// from s while writing the cache and commits the copy once the whole blob
// was read and verified. Everything else goes to s. The result has exactly
// the optional abilities of s (found through Unwrap for those compose does
// not carry).
func NewCached(s Store, c *BlobCache) Store {
	w := &cachedStore{Store: s, c: c}
	sw, _ := s.(TagSwapper)
	ml, _ := s.(ManifestLister)
	sc, _ := s.(Scrubber)
	var dl wrapDeleter
	if _, ok := s.(Deleter); ok {
		dl = cachedDeleter{w}
	}
	return compose(w, sw, ml, sc, dl)
}

// BlobCache returns the cache.
func (w *cachedStore) BlobCache() *BlobCache { return w.c }

// Unwrap returns the wrapped store.
func (w *cachedStore) Unwrap() Store { return w.Store }
func (w *cachedStore) self() Store   { return w }

// Blob serves the cached copy or reads through to the wrapped store.
func (w *cachedStore) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	if w.c.Has(dgst, -1) {
		if f, _, err := w.c.Open(dgst, -1); err == nil {
			return f, nil
		}
	}
	rc, err := w.Store.Blob(ctx, repo, dgst)
	if err != nil {
		return nil, err
	}
	tmp, err := w.c.temp()
	if err != nil {
		return rc, nil // no room to cache: read through
	}
	return &fillingReader{rc: rc, tmp: tmp, c: w.c, dgst: dgst}, nil
}

// fillingReader copies what it reads into a temporary cache file and
// adopts it at a clean end (the wrapped reader verified the digest).
type fillingReader struct {
	rc   io.ReadCloser
	tmp  *os.File
	c    *BlobCache
	dgst v1.Hash
	n    int64
	bad  bool
}

func (r *fillingReader) Read(p []byte) (int, error) {
	n, err := r.rc.Read(p)
	if n > 0 && !r.bad {
		if _, werr := r.tmp.Write(p[:n]); werr != nil {
			r.bad = true
		}
		r.n += int64(n)
	}
	if err == io.EOF && !r.bad && r.tmp != nil {
		if r.n >= minCached {
			r.c.adopt(r.tmp, r.dgst, r.n) // hashes again: never trust the path taken
		} else {
			os.Remove(r.tmp.Name())
		}
		r.tmp.Close()
		r.tmp = nil
	} else if err != nil && err != io.EOF {
		r.bad = true
	}
	return n, err
}

func (r *fillingReader) Close() error {
	if r.tmp != nil {
		r.tmp.Close()
		os.Remove(r.tmp.Name())
		r.tmp = nil
	}
	return r.rc.Close()
}

// Ability returns the first store along s's chain of wrappers (through
// Unwrap) that has the ability T.
func Ability[T any](s Store) (T, bool) {
	for s != nil {
		if t, ok := s.(T); ok {
			return t, true
		}
		if w, ok := s.(interface{ self() Store }); ok {
			if t, ok := w.self().(T); ok {
				return t, true
			}
		}
		u, ok := s.(interface{ Unwrap() Store })
		if !ok {
			break
		}
		s = u.Unwrap()
	}
	var zero T
	return zero, false
}
