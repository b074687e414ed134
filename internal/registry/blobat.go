package registry

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"hash"
	"io"
	"net/http"
	"os"
	"strconv"
	"sync"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// BlobRanger is a store that can read part of a blob. The bytes are NOT
// verified: a part cannot be checked against the whole blob's digest.
// Callers check them against digests from a verified source (OpenBlobAt
// with BlockDigests).
type BlobRanger interface {
	// BlobRange reads n bytes of blob dgst from offset off. A store that
	// cannot (a registry ignoring Range) fails with ErrNoRanges.
	BlobRange(ctx context.Context, repo string, dgst v1.Hash, off, n int64) (io.ReadCloser, error)
}

// ErrNoRanges: the store answered a ranged read with something else.
var ErrNoRanges = errors.New("the store does not serve parts of blobs")

var (
	_ BlobRanger = (*Remote)(nil)
	_ BlobRanger = (*GCS)(nil)
)

// BlobRange reads bytes [off, off+n) of a blob with an HTTP Range request
// (distribution-spec v1.1 lets registries support it on blob GETs;
// Debian's docker-registry does). A 200 answer (Range ignored) is
// ErrNoRanges.
func (r *Remote) BlobRange(ctx context.Context, repo string, dgst v1.Hash, off, n int64) (io.ReadCloser, error) {
	if err := r.checkBlobArgs(repo, dgst); err != nil {
		return nil, err
	}
	if off < 0 || n <= 0 {
		return nil, errkind.New(errkind.Internal, "range %d+%d of blob %s", off, n, dgst)
	}
	full := fullName(r.prefix, repo)
	hdr := http.Header{"Range": {"bytes=" + strconv.FormatInt(off, 10) + "-" + strconv.FormatInt(off+n-1, 10)}}
	resp, err := r.call(ctx, full, http.MethodGet, "/v2/"+full+"/blobs/"+dgst.String(), hdr, nil, 0, http.StatusOK, http.StatusPartialContent)
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return nil, notFound("blob %s in %s", dgst, repo)
		}
		return nil, fmt.Errorf("reading blob %s: %w", dgst, err)
	}
	if resp.StatusCode != http.StatusPartialContent {
		resp.Body.Close()
		return nil, fmt.Errorf("reading bytes %d-%d of blob %s: %w (status %d)", off, off+n-1, dgst, ErrNoRanges, resp.StatusCode)
	}
	return resp.Body, nil
}

// BlobRange reads bytes [off, off+n) of a blob (a GCS ranged read).
func (g *GCS) BlobRange(ctx context.Context, repo string, dgst v1.Hash, off, n int64) (io.ReadCloser, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := checkDigest(dgst); err != nil {
		return nil, err
	}
	rd, err := g.bucket.Object(g.blobKey(dgst)).NewRangeReader(ctx, off, n)
	if err != nil {
		err = gcsErr(err)
		if errors.Is(err, ErrNotFound) {
			return nil, notFound("blob %s", dgst)
		}
		return nil, fmt.Errorf("reading blob %s: %w", dgst, err)
	}
	return gcsBody{rd}, nil
}

// BlockDigests describe a blob as consecutive blocks of Size bytes (the
// last one shorter), each with its sha256 in hex: what lets a reader
// verify part of a blob. They are recorded beside the blob's digest by
// whoever wrote it, in content that is itself verified by digest (a
// holdout's summary, the config blob of its manifest).
type BlockDigests struct {
	Size   int64    `json:"size"`
	SHA256 []string `json:"sha256"`
}

// MaxBlocks bounds the blocks of a blob (BlockSize grows with the blob).
const MaxBlocks = 2048

// BlockSize is the block size for a blob of total bytes: 64 KiB, doubled
// until the blob has at most MaxBlocks blocks. Our own choice: small
// enough that a shard fetches little beyond its row groups, large enough
// that a block's digest (32 bytes) is under 0.05% of it.
func BlockSize(total int64) int64 {
	b := int64(64 << 10)
	for (total+b-1)/b > MaxBlocks {
		b *= 2
	}
	return b
}

// Check reports whether the digests fit a blob of total bytes.
func (b *BlockDigests) Check(total int64) error {
	if b.Size <= 0 || b.Size&(b.Size-1) != 0 || int64(len(b.SHA256)) != (total+b.Size-1)/b.Size {
		return fmt.Errorf("block digests: %d blocks of %d bytes do not cover %d bytes", len(b.SHA256), b.Size, total)
	}
	for i, h := range b.SHA256 {
		if len(h) != 64 {
			return fmt.Errorf("block digests: block %d: %q is not a sha256 in hex", i, h)
		}
		if _, err := hex.DecodeString(h); err != nil {
			return fmt.Errorf("block digests: block %d: %q is not a sha256 in hex", i, h)
		}
	}
	return nil
}

// BlockHasher is an io.Writer computing the BlockDigests of what is
// written to it, for a blob of a known total size.
type BlockHasher struct {
	size int64
	h    hash.Hash
	in   int64 // bytes in the current block
	out  []string
}

// NewBlockHasher hashes a blob of total bytes in BlockSize(total) blocks.
func NewBlockHasher(total int64) *BlockHasher {
	return &BlockHasher{size: BlockSize(total), h: sha256.New()}
}

func (b *BlockHasher) Write(p []byte) (int, error) {
	n := len(p)
	for len(p) > 0 {
		k := min(int64(len(p)), b.size-b.in)
		b.h.Write(p[:k])
		b.in += k
		p = p[k:]
		if b.in == b.size {
			b.out = append(b.out, hex.EncodeToString(b.h.Sum(nil)))
			b.h.Reset()
			b.in = 0
		}
	}
	return n, nil
}

// Digests returns the block digests of everything written.
func (b *BlockHasher) Digests() *BlockDigests {
	out := append([]string(nil), b.out...)
	if b.in > 0 {
		out = append(out, hex.EncodeToString(b.h.Sum(nil)))
	}
	return &BlockDigests{Size: b.size, SHA256: out}
}

// BlobAt reads a blob at random offsets, each byte checked before it is
// returned. See OpenBlobAt for where the bytes come from.
type BlobAt struct {
	size int64
	file *os.File // the whole blob, verified; or the sparse copy of fetched blocks
	keep bool     // file is the cache's: do not remove it

	// Ranged mode (blocks != nil): the blocks fetched so far.
	ctx     context.Context
	store   Store
	ranger  BlobRanger
	repo    string
	dgst    v1.Hash
	blocks  *BlockDigests
	cache   *BlobCache
	mu      sync.Mutex
	have    []bool
	missing int
	fetched int64
	err     error // sticky integrity failure
	next    int   // the block after the last fetch: a read there is sequential
	ahead   int   // blocks fetched beyond the read: grows while reads are sequential
}

// maxReadAhead bounds the blocks fetched beyond what a read asks for (1
// MiB at 64 KiB blocks). Our own choice: a sequential reader (a Parquet
// column chunk read page by page) then sends one request per growing run
// of blocks instead of one per block, and a reader that stops wastes at
// most this much.
const maxReadAhead = 16

// OpenBlobAt opens blob dgst (size bytes) of repo for random access:
//   - from the store's local BlobCache when it holds the blob (re-hashed
//     on open);
//   - else, when blocks are given and the store reads ranges
//     (BlobRanger), by fetching only the blocks read, each checked against
//     its block digest before use; when every block has been fetched, the
//     whole copy is hashed against dgst and, on a match, adopted by the
//     cache;
//   - else the whole blob through the store (verified while it is read)
//     into the cache, or into a temporary file without one.
//
// Trust: blocks must come from a verified source (content addressed by a
// digest the caller verified). Then a store serving other bytes for a
// range, or a whole blob, fails the read with ErrDigestMismatch
// (errkind.Integrity); it can never change the bytes a reader sees.
func OpenBlobAt(ctx context.Context, s Store, repo string, dgst v1.Hash, size int64, blocks *BlockDigests) (*BlobAt, error) {
	bc, _ := Ability[BlobCacher](s)
	var cache *BlobCache
	if bc != nil {
		cache = bc.BlobCache()
	}
	if cache != nil && cache.Has(dgst, size) {
		if f, n, err := cache.Open(dgst, size); err == nil {
			return &BlobAt{size: n, file: f, keep: true}, nil
		}
	}
	ranger, ok := Ability[BlobRanger](s)
	if ok && blocks != nil && blocks.Check(size) == nil && size > 0 {
		var f *os.File
		var err error
		if cache != nil {
			f, err = cache.temp()
		} else {
			f, err = os.CreateTemp("", "modelgate-blob-")
		}
		if err != nil {
			return nil, err
		}
		if err := f.Truncate(size); err != nil {
			f.Close()
			os.Remove(f.Name())
			return nil, err
		}
		return &BlobAt{size: size, file: f, ctx: ctx, store: s, ranger: ranger, repo: repo, dgst: dgst, blocks: blocks, cache: cache,
			have: make([]bool, len(blocks.SHA256)), missing: len(blocks.SHA256)}, nil
	}
	if cache != nil {
		f, n, err := cache.Fetch(ctx, s, repo, dgst, size)
		if err != nil {
			return nil, err
		}
		return &BlobAt{size: n, file: f, keep: true, fetched: n}, nil
	}
	f, err := os.CreateTemp("", "modelgate-blob-")
	if err != nil {
		return nil, err
	}
	rc, err := s.Blob(ctx, repo, dgst)
	if err == nil {
		var n int64
		n, err = io.Copy(f, rc) // the store's reader verifies the digest
		rc.Close()
		if err == nil && n != size {
			err = errkind.New(errkind.Integrity, "reading blob %s: %w: got %d bytes, want %d", dgst, ErrDigestMismatch, n, size)
		}
	}
	if err != nil {
		f.Close()
		os.Remove(f.Name())
		return nil, err
	}
	return &BlobAt{size: size, file: f, fetched: size}, nil
}

// Size is the blob's size.
func (b *BlobAt) Size() int64 { return b.size }

// Fetched counts the bytes this reader got from the store (0 when the
// cache held the blob).
func (b *BlobAt) Fetched() int64 {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.fetched
}

// Close releases the reader and its temporary file.
func (b *BlobAt) Close() error {
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.file == nil {
		return nil
	}
	err := b.file.Close()
	if !b.keep {
		os.Remove(b.file.Name())
	}
	b.file = nil
	return err
}

// Whole fetches every block not fetched yet and checks the whole blob
// against its digest (a reader that will read everything anyway learns of
// damage before it starts).
func (b *BlobAt) Whole() error {
	if b.blocks == nil || b.size == 0 {
		return nil
	}
	return b.ensure(0, b.size)
}

// ReadAt reads verified bytes.
func (b *BlobAt) ReadAt(p []byte, off int64) (int, error) {
	if off < 0 {
		return 0, fmt.Errorf("blob %s: negative offset", b.dgst)
	}
	if off >= b.size {
		return 0, io.EOF
	}
	end := min(off+int64(len(p)), b.size)
	if b.blocks != nil {
		if err := b.ensure(off, end); err != nil {
			return 0, err
		}
	}
	n, err := b.file.ReadAt(p[:end-off], off)
	if err == nil && end-off < int64(len(p)) {
		err = io.EOF
	}
	return n, err
}

// ensure fetches and checks the blocks covering [off, end).
func (b *BlobAt) ensure(off, end int64) error {
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.err != nil {
		return b.err
	}
	if b.file == nil {
		return fmt.Errorf("blob %s: read after close", b.dgst)
	}
	bs := b.blocks.Size
	first, last := int(off/bs), int((end-1)/bs)
	for i := first; i <= last; {
		if b.have[i] {
			i++
			continue
		}
		j := i
		for j+1 <= last && !b.have[j+1] {
			j++
		}
		// Read ahead while the reads run on from the last fetch (or skip
		// forward a little, as from one column chunk to the next),
		// doubling up to maxReadAhead blocks; a jump back or far ahead
		// starts over.
		if b.fetched > 0 && i >= b.next && i <= b.next+maxReadAhead {
			b.ahead = min(max(2*b.ahead, 1), maxReadAhead)
		} else {
			b.ahead = 0
		}
		if j == last {
			for k := 0; k < b.ahead && j+1 < len(b.have) && !b.have[j+1]; k++ {
				j++
			}
		}
		err := b.fetch(i, j)
		if errors.Is(err, ErrNoRanges) {
			return b.fetchWhole()
		}
		if err != nil {
			if errkind.Is(err, errkind.Integrity) {
				b.err = err
			}
			return err
		}
		b.next = j + 1
		i = j + 1
	}
	return nil
}

// fetch reads blocks i..j with one ranged read (retrying transient
// failures), checks each, and writes it into the sparse copy.
func (b *BlobAt) fetch(i, j int) error {
	bs := b.blocks.Size
	off := int64(i) * bs
	n := min(int64(j+1)*bs, b.size) - off
	buf := make([]byte, n)
	var err error
	wait := 250 * time.Millisecond
	for attempt := 0; ; attempt++ {
		err = b.readRange(buf, off)
		if err == nil || !IsTransient(err) || attempt == 3 {
			break
		}
		select {
		case <-b.ctx.Done():
			return b.ctx.Err()
		case <-time.After(wait):
		}
		wait *= 2
	}
	if err != nil {
		return err
	}
	b.fetched += n
	for k := i; k <= j; k++ {
		lo := int64(k-i) * bs
		hi := min(lo+bs, n)
		sum := sha256.Sum256(buf[lo:hi])
		if hex.EncodeToString(sum[:]) != b.blocks.SHA256[k] {
			return errkind.New(errkind.Integrity, "reading blob %s: %w: bytes %d-%d (block %d) the store served hash to sha256:%s, the blob's block digests say sha256:%s",
				b.dgst, ErrDigestMismatch, off+lo, off+hi-1, k, hex.EncodeToString(sum[:]), b.blocks.SHA256[k])
		}
	}
	if _, err := b.file.WriteAt(buf, off); err != nil {
		return err
	}
	for k := i; k <= j; k++ {
		b.have[k] = true
	}
	b.missing -= j - i + 1
	if b.missing == 0 {
		return b.complete()
	}
	return nil
}

// fetchWhole reads the whole blob (verified by the store's reader) over
// the sparse copy, for a store that turned out not to serve ranges.
func (b *BlobAt) fetchWhole() error {
	rc, err := b.store.Blob(b.ctx, b.repo, b.dgst)
	if err != nil {
		return err
	}
	defer rc.Close()
	n, err := io.Copy(io.NewOffsetWriter(b.file, 0), rc)
	b.fetched += n
	if err == nil && n != b.size {
		err = errkind.New(errkind.Integrity, "reading blob %s: %w: got %d bytes, want %d", b.dgst, ErrDigestMismatch, n, b.size)
	}
	if err != nil {
		if errkind.Is(err, errkind.Integrity) {
			b.err = err
		}
		return err
	}
	for k := range b.have {
		b.have[k] = true
	}
	b.missing = 0
	return b.complete()
}

// readRange fills buf from the store at off.
func (b *BlobAt) readRange(buf []byte, off int64) error {
	rc, err := b.ranger.BlobRange(b.ctx, b.repo, b.dgst, off, int64(len(buf)))
	if err != nil {
		return err
	}
	defer rc.Close()
	if _, err := io.ReadFull(rc, buf); err != nil {
		if err == io.EOF || err == io.ErrUnexpectedEOF {
			return errkind.New(errkind.Integrity, "reading blob %s: %w: the store served fewer than the %d bytes asked for at %d", b.dgst, ErrDigestMismatch, len(buf), off)
		}
		return fmt.Errorf("reading blob %s: %w", b.dgst, transient(err))
	}
	return nil
}

// complete checks a copy whose every block was fetched against the whole
// blob's digest: block digests that do not describe the blob (recorded
// wrongly) are caught here. A matching copy joins the cache.
func (b *BlobAt) complete() error {
	h := sha256.New()
	if _, err := io.Copy(h, io.NewSectionReader(b.file, 0, b.size)); err != nil {
		return err
	}
	if got := hex.EncodeToString(h.Sum(nil)); got != b.dgst.Hex {
		return errkind.New(errkind.Integrity, "reading blob %s: %w: every block matched its block digest but the whole blob hashes to sha256:%s: the block digests do not describe this blob",
			b.dgst, ErrDigestMismatch, got)
	}
	if b.cache != nil {
		if err := b.cache.adopt(b.file, b.dgst, b.size); err == nil {
			b.keep = true // renamed into the cache; the open file stays valid
		}
	}
	return nil
}
