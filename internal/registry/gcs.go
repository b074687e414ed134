package registry

import (
	"context"
	"crypto/rand"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"net/http"
	"sort"
	"strings"

	"cloud.google.com/go/storage"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
	"google.golang.org/api/googleapi"
	"google.golang.org/api/iterator"
	"google.golang.org/api/option"

	"github.com/modelgate/modelgate/internal/errkind"
)

// GCS is a store in a Google Cloud Storage bucket, under a prefix. Object
// layout (PREFIX/ omitted when the prefix is empty):
//
//	PREFIX/blobs/sha256/<hex>                                  blob bytes, shared by all repositories
//	PREFIX/repositories/<repo>/_manifests/sha256/<hex>         manifest bytes (Content-Type: its media type;
//	                                                           metadata artifactType, subject)
//	PREFIX/repositories/<repo>/_tags/<tag>                     the tagged manifest's descriptor, JSON
//	PREFIX/repositories/<repo>/_referrers/<subject>/<referrer> the referrer's descriptor, JSON
//	PREFIX/_repositories/<repo>                                empty marker: repo holds a manifest
//
// The store's own path components start with '_', which no component of a
// repository name may (OCI distribution spec), so a repository "a/_tags"
// cannot exist to collide with repository "a" (the distribution project's
// own storage layout does the same).
//
// Guarantees:
//   - Blobs and manifests are written create-only (precondition
//     DoesNotExist) and only after their bytes hash to their digest; the
//     upload is abandoned, not finalised, when they do not. CRC32C is sent
//     with every upload (computed up front for manifests and tags, by the
//     client library for blobs) and checked by the library on full reads;
//     every read is also hashed with sha256 against its digest.
//   - Order: blobs, manifest, referrer link, repository marker, tag.
//   - SwapTag is a true compare-and-swap: the tag object is rewritten with
//     a generation precondition (create-only when the tag must be absent).
//     The client library retries conditional writes; a retry can meet 412
//     after its own first attempt landed, so on 412 the store reads the tag
//     back and compares a random token it wrote into the tag object before
//     calling it a conflict.
//
// Credentials: Application Default Credentials, unless client options say
// otherwise; STORAGE_EMULATOR_HOST is honoured by the client library.
//
// Errors as for Remote: ErrNotFound (BadInput), ErrDigestMismatch
// (Integrity on read, BadInput on upload), ErrConflict (Conflict),
// errkind.Unauthorized for 401/403, ErrTransient for 429/5xx and network
// failures.
type GCS struct {
	client *storage.Client
	bucket *storage.BucketHandle
	name   string
	prefix string
	owns   bool
}

var (
	_ Store          = (*GCS)(nil)
	_ TagSwapper     = (*GCS)(nil)
	_ ManifestLister = (*GCS)(nil)
	_ Scrubber       = (*GCS)(nil)
)

// ParseGCSLocation splits "gs://BUCKET[/PREFIX]" into bucket and prefix.
func ParseGCSLocation(loc string) (bucket, prefix string, err error) {
	s, ok := strings.CutPrefix(loc, "gs://")
	if !ok {
		return "", "", errkind.New(errkind.BadInput, "GCS store %q: want gs://BUCKET/PREFIX", loc)
	}
	bucket, prefix, _ = strings.Cut(s, "/")
	prefix = strings.Trim(prefix, "/")
	if bucket == "" || len(bucket) > 222 || strings.ContainsAny(bucket, " @:") {
		return "", "", errkind.New(errkind.BadInput, "GCS store %q: invalid bucket name %q", loc, bucket)
	}
	for _, c := range strings.Split(prefix, "/") {
		if prefix != "" && (c == "" || c == "." || c == ".." || strings.HasPrefix(c, "_")) {
			return "", "", errkind.New(errkind.BadInput, "GCS store %q: invalid prefix component %q", loc, c)
		}
	}
	return bucket, prefix, nil
}

// OpenGCS opens the store at "gs://BUCKET/PREFIX" with a new client made
// from opts (default: Application Default Credentials;
// STORAGE_EMULATOR_HOST honoured). Close releases the client.
func OpenGCS(ctx context.Context, loc string, opts ...option.ClientOption) (*GCS, error) {
	bucket, prefix, err := ParseGCSLocation(loc)
	if err != nil {
		return nil, err
	}
	c, err := storage.NewClient(ctx, opts...)
	if err != nil {
		return nil, errkind.New(errkind.Unauthorized, "GCS store %s: creating the client: %w", loc, err)
	}
	g := NewGCS(c, bucket, prefix)
	g.owns = true
	return g, nil
}

// NewGCS returns the store in bucket under prefix, using client (which the
// caller keeps and closes).
func NewGCS(client *storage.Client, bucket, prefix string) *GCS {
	return &GCS{client: client, bucket: client.Bucket(bucket), name: bucket, prefix: strings.Trim(prefix, "/")}
}

// Close releases the client when OpenGCS made it.
func (g *GCS) Close() error {
	if g.owns {
		return g.client.Close()
	}
	return nil
}

// String names the store: gs://BUCKET/PREFIX.
func (g *GCS) String() string { return strings.TrimSuffix("gs://"+g.name+"/"+g.prefix, "/") }

func (g *GCS) key(parts ...string) string {
	k := strings.Join(parts, "/")
	if g.prefix != "" {
		k = g.prefix + "/" + k
	}
	return k
}

func (g *GCS) blobKey(d v1.Hash) string { return g.key("blobs", "sha256", d.Hex) }
func (g *GCS) manifestKey(repo string, d v1.Hash) string {
	return g.key("repositories", repo, "_manifests", "sha256", d.Hex)
}
func (g *GCS) tagKey(repo, tag string) string { return g.key("repositories", repo, "_tags", tag) }
func (g *GCS) referrersKey(repo string, subject v1.Hash) string {
	return g.key("repositories", repo, "_referrers", subject.Hex) + "/"
}
func (g *GCS) markerKey(repo string) string { return g.key("_repositories", repo) }

// gcsErr classifies a client error.
func gcsErr(err error) error {
	if err == nil {
		return nil
	}
	if errors.Is(err, storage.ErrObjectNotExist) {
		return errkind.New(errkind.BadInput, "%w: %w", ErrNotFound, err)
	}
	if errors.Is(err, storage.ErrBucketNotExist) {
		return errkind.New(errkind.BadInput, "%w: %w", ErrNotFound, err)
	}
	if errors.Is(err, context.Canceled) || errors.Is(err, context.DeadlineExceeded) {
		return err
	}
	var ge *googleapi.Error
	if errors.As(err, &ge) {
		switch {
		case ge.Code == http.StatusNotFound:
			return errkind.New(errkind.BadInput, "%w: %w", ErrNotFound, err)
		case ge.Code == http.StatusUnauthorized || ge.Code == http.StatusForbidden:
			return errkind.Wrap(errkind.Unauthorized, err)
		case ge.Code == http.StatusPreconditionFailed:
			return errkind.New(errkind.Conflict, "%w: %w", ErrConflict, err)
		case ge.Code == http.StatusTooManyRequests || ge.Code == http.StatusRequestTimeout || ge.Code >= 500:
			return transient(err)
		case ge.Code >= 400:
			return errkind.Wrap(errkind.BadInput, err)
		}
	}
	if IsTransient(err) {
		return transient(err)
	}
	return err
}

func isPrecondition(err error) bool {
	var ge *googleapi.Error
	return errors.As(err, &ge) && ge.Code == http.StatusPreconditionFailed
}

// writeSmall writes b to key with a CRC32C the server checks, under cond
// (nil: unconditional).
func (g *GCS) writeSmall(ctx context.Context, key string, b []byte, contentType string, meta map[string]string, cond *storage.Conditions) error {
	obj := g.bucket.Object(key)
	if cond != nil {
		obj = obj.If(*cond)
	}
	w := obj.NewWriter(ctx)
	w.ContentType = contentType
	w.Metadata = meta
	w.CRC32C = crc32.Checksum(b, crc32.MakeTable(crc32.Castagnoli))
	w.SendCRC32C = true
	w.ChunkSize = 0 // one request
	if _, err := w.Write(b); err != nil {
		w.Close()
		return err
	}
	return w.Close()
}

// readSmall reads at most limit bytes of key; more is an error.
func (g *GCS) readSmall(ctx context.Context, key string, limit int64) ([]byte, *storage.ReaderObjectAttrs, error) {
	r, err := g.bucket.Object(key).NewReader(ctx)
	if err != nil {
		return nil, nil, gcsErr(err)
	}
	defer r.Close()
	b, err := io.ReadAll(io.LimitReader(r, limit+1))
	if err != nil {
		return nil, nil, gcsReadErr(err)
	}
	if int64(len(b)) > limit {
		return nil, nil, errkind.New(errkind.Integrity, "object %s is larger than %d bytes", key, limit)
	}
	return b, &r.Attrs, nil
}

// ---- blobs ----

// StatBlob returns a blob's size (the object's; its content is verified on
// read and by Scrub).
func (g *GCS) StatBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	if err := ValidateRepository(repo); err != nil {
		return 0, err
	}
	if err := checkDigest(dgst); err != nil {
		return 0, err
	}
	a, err := g.bucket.Object(g.blobKey(dgst)).Attrs(ctx)
	if err != nil {
		err = gcsErr(err)
		if errors.Is(err, ErrNotFound) {
			return 0, notFound("blob %s", dgst)
		}
		return 0, fmt.Errorf("stat blob %s: %w", dgst, err)
	}
	return a.Size, nil
}

// Blob opens a blob; the reader verifies size and sha256 (and the client
// library its CRC32C).
func (g *GCS) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := checkDigest(dgst); err != nil {
		return nil, err
	}
	r, err := g.bucket.Object(g.blobKey(dgst)).NewReader(ctx)
	if err != nil {
		err = gcsErr(err)
		if errors.Is(err, ErrNotFound) {
			return nil, notFound("blob %s", dgst)
		}
		return nil, fmt.Errorf("reading blob %s: %w", dgst, err)
	}
	return newCheckedReader(gcsBody{r}, dgst, r.Attrs.Size, "blob "+dgst.String()), nil
}

// gcsBody classifies read errors (the library reports a CRC32C mismatch
// as a plain error: it is damage, not a transient failure).
type gcsBody struct{ r *storage.Reader }

func (b gcsBody) Read(p []byte) (int, error) {
	n, err := b.r.Read(p)
	if err != nil && err != io.EOF {
		return n, gcsReadErr(err)
	}
	return n, err
}

// gcsReadErr classifies a read error: the library's CRC32C check failing
// is damage (or corruption in transit), not a transient failure.
func gcsReadErr(err error) error {
	if s := err.Error(); strings.Contains(s, "bad CRC") || strings.Contains(s, "checksum mismatch") {
		return errkind.New(errkind.Integrity, "%w: %w", ErrDigestMismatch, err)
	}
	return gcsErr(err)
}

func (b gcsBody) Close() error { return b.r.Close() }

// PutBlob uploads a blob unless an object of that size is there. The
// write is create-only (or replaces, by generation, an object of the wrong
// size); content that does not hash to dgst or is not size bytes is
// refused before the upload is finalised.
func (g *GCS) PutBlob(ctx context.Context, repo string, dgst v1.Hash, size int64, body io.Reader) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	if size < 0 {
		return errkind.New(errkind.BadInput, "blob %s: negative size %d", dgst, size)
	}
	obj := g.bucket.Object(g.blobKey(dgst))
	cond := storage.Conditions{DoesNotExist: true}
	a, err := obj.Attrs(ctx)
	if err == nil && a.Size == size {
		// Present: refreshed (Refresher), unless it went meanwhile.
		_, err = g.refreshBlob(ctx, dgst)
		if !errors.Is(err, ErrNotFound) {
			return err
		}
		err = storage.ErrObjectNotExist
	}
	switch {
	case err == nil:
		cond = storage.Conditions{GenerationMatch: a.Generation} // damaged: replace it
	case !errors.Is(err, storage.ErrObjectNotExist):
		return fmt.Errorf("stat blob %s: %w", dgst, gcsErr(err))
	}
	wctx, cancel := context.WithCancel(ctx)
	defer cancel()
	w := obj.If(cond).NewWriter(wctx)
	w.ContentType = "application/octet-stream"
	ur := newUploadReader(body, dgst, size)
	if _, err := io.Copy(w, ur); err != nil {
		cancel() // abandon: the object is never finalised
		w.Close()
		if ur.err != nil {
			return ur.err
		}
		return fmt.Errorf("uploading blob %s: %w", dgst, gcsErr(err))
	}
	if ur.err != nil {
		cancel()
		w.Close()
		return ur.err
	}
	if err := w.Close(); err != nil {
		if isPrecondition(err) {
			return nil // another writer stored it meanwhile (content-addressed)
		}
		return fmt.Errorf("uploading blob %s: %w", dgst, gcsErr(err))
	}
	return nil
}

// ---- manifests ----

// PutManifest checks that every blob (for an index: every manifest) it
// references is present, naming each missing digest, then writes the
// manifest create-only, its referrer link when it has a subject, and the
// repository marker.
func (g *GCS) PutManifest(ctx context.Context, repo string, mediaType types.MediaType, raw []byte) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	mf, mt, err := parseManifest(mediaType, raw)
	if err != nil {
		return v1.Descriptor{}, err
	}
	desc := descriptorOf(mt, raw, mf)
	if err := g.checkReferences(ctx, repo, mt, mf); err != nil {
		return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", desc.Digest, repo, err)
	}
	meta := map[string]string{"artifactType": desc.ArtifactType}
	if mf.Subject != nil {
		meta["subject"] = mf.Subject.Digest.String()
	}
	// Create-only; a manifest already there is refreshed (Refresher), and
	// written again when it went between the two.
	for try := 0; ; try++ {
		err = g.writeSmall(ctx, g.manifestKey(repo, desc.Digest), raw, string(mt), meta, &storage.Conditions{DoesNotExist: true})
		if err == nil || !isPrecondition(err) || try > 0 {
			break
		}
		if _, err = g.refreshObject(ctx, g.manifestKey(repo, desc.Digest)); !errors.Is(err, ErrNotFound) {
			break
		}
	}
	if err != nil && !isPrecondition(err) {
		return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", desc.Digest, repo, gcsErr(err))
	}
	if mf.Subject != nil {
		link := desc
		link.Annotations = mf.Annotations
		b, _ := json.Marshal(link)
		err := g.writeSmall(ctx, g.referrersKey(repo, mf.Subject.Digest)+desc.Digest.Hex, b, "application/json", nil, &storage.Conditions{DoesNotExist: true})
		if err != nil && !isPrecondition(err) {
			return v1.Descriptor{}, fmt.Errorf("recording %s as a referrer of %s: %w", desc.Digest, mf.Subject.Digest, gcsErr(err))
		}
	}
	err = g.writeSmall(ctx, g.markerKey(repo), nil, "application/octet-stream", nil, &storage.Conditions{DoesNotExist: true})
	if err != nil && !isPrecondition(err) {
		return v1.Descriptor{}, fmt.Errorf("recording repository %s: %w", repo, gcsErr(err))
	}
	return desc, nil
}

// checkReferences applies checkRefs with the bucket's lookups.
func (g *GCS) checkReferences(ctx context.Context, repo string, mt types.MediaType, mf manifestFields) error {
	// Each blob is refreshed (Refresher): a manifest is never put naming a
	// blob a collection is removing, however its writer checked for it.
	return checkRefs(mt, mf, func(d v1.Hash) (int64, error) { return g.refreshBlob(ctx, d) }, func(d v1.Hash) error {
		_, err := g.bucket.Object(g.manifestKey(repo, d)).Attrs(ctx)
		if errors.Is(err, storage.ErrObjectNotExist) {
			return notFound("manifest %s", d)
		}
		return gcsErr(err)
	})
}

// Manifest reads and verifies a manifest of repo.
func (g *GCS) Manifest(ctx context.Context, repo string, dgst v1.Hash) ([]byte, v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, v1.Descriptor{}, err
	}
	if err := checkDigest(dgst); err != nil {
		return nil, v1.Descriptor{}, err
	}
	raw, attrs, err := g.readSmall(ctx, g.manifestKey(repo, dgst), MaxManifestSize)
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return nil, v1.Descriptor{}, notFound("manifest %s in repository %s", dgst, repo)
		}
		return nil, v1.Descriptor{}, fmt.Errorf("reading manifest %s: %w", dgst, err)
	}
	sum := sha256.Sum256(raw)
	if got := hex.EncodeToString(sum[:]); got != dgst.Hex {
		return nil, v1.Descriptor{}, errkind.New(errkind.Integrity, "reading manifest %s: %w: stored content hashes to sha256:%s", dgst, ErrDigestMismatch, got)
	}
	var mf manifestFields
	_ = json.Unmarshal(raw, &mf)
	mt := types.MediaType(attrs.ContentType)
	if mf.MediaType != "" {
		mt = mf.MediaType
	}
	return raw, descriptorOf(mt, raw, mf), nil
}

// eachObject calls f on every object under prefix, in listing order; a
// listing failure is reported as what (f's errors are returned as they
// are).
func (g *GCS) eachObject(ctx context.Context, prefix, what string, f func(*storage.ObjectAttrs) error) error {
	it := g.bucket.Objects(ctx, &storage.Query{Prefix: prefix})
	for {
		a, err := it.Next()
		if err == iterator.Done {
			return nil
		}
		if err != nil {
			return fmt.Errorf("%s: %w", what, gcsErr(err))
		}
		if err := f(a); err != nil {
			return err
		}
	}
}

// Manifests lists every manifest of repo from the object listing (no
// reads), sorted by digest, with media type, size and artifactType.
func (g *GCS) Manifests(ctx context.Context, repo string) ([]v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	prefix := g.key("repositories", repo, "_manifests", "sha256") + "/"
	out := []v1.Descriptor{}
	err := g.eachObject(ctx, prefix, "listing manifests of "+repo, func(a *storage.ObjectAttrs) error {
		h := strings.TrimPrefix(a.Name, prefix)
		if !hexPattern.MatchString(h) {
			return nil
		}
		out = append(out, v1.Descriptor{MediaType: types.MediaType(a.ContentType), Size: a.Size,
			Digest: v1.Hash{Algorithm: "sha256", Hex: h}, ArtifactType: a.Metadata["artifactType"]})
		return nil
	})
	if err != nil {
		return nil, err
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Digest.String() < out[j].Digest.String() })
	return out, nil
}

// Referrers lists the referrer links of subject in repo and reads each
// referrer's manifest (verified) for its artifactType and annotations.
func (g *GCS) Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) ([]v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := checkDigest(subject); err != nil {
		return nil, err
	}
	prefix := g.referrersKey(repo, subject)
	out := []v1.Descriptor{}
	err := g.eachObject(ctx, prefix, "listing referrers of "+subject.String(), func(a *storage.ObjectAttrs) error {
		h := strings.TrimPrefix(a.Name, prefix)
		if !hexPattern.MatchString(h) {
			return nil
		}
		raw, d, err := g.Manifest(ctx, repo, v1.Hash{Algorithm: "sha256", Hex: h})
		if err != nil {
			return fmt.Errorf("referrer of %s: %w", subject, err)
		}
		var mf manifestFields
		if json.Unmarshal(raw, &mf) != nil || mf.Subject == nil || mf.Subject.Digest != subject {
			return errkind.New(errkind.Integrity, "referrer link %s names a manifest whose subject is not %s", a.Name, subject)
		}
		if artifactType != "" && d.ArtifactType != artifactType {
			return nil
		}
		if len(mf.Annotations) > 0 {
			d.Annotations = mf.Annotations
		}
		out = append(out, d)
		return nil
	})
	if err != nil {
		return nil, err
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Digest.String() < out[j].Digest.String() })
	return out, nil
}

// ---- tags ----

// tagObject is the content of a tag object: the manifest's descriptor.
type tagObject struct {
	MediaType types.MediaType `json:"mediaType"`
	Digest    v1.Hash         `json:"digest"`
	Size      int64           `json:"size"`
	// SwapToken is a random value written by SwapTag, to recognise its
	// own write when a retried request meets 412.
	SwapToken string `json:"swapToken,omitempty"`
}

const maxTagObject = 4096

// Resolve reads repo:tag's object.
func (g *GCS) Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	if err := ValidateTag(tag); err != nil {
		return v1.Descriptor{}, err
	}
	d, _, _, err := g.readTag(ctx, repo, tag)
	return d, err
}

// readTag returns the tag's descriptor, the object's generation and its
// swap token.
func (g *GCS) readTag(ctx context.Context, repo, tag string) (v1.Descriptor, int64, string, error) {
	key := g.tagKey(repo, tag)
	b, attrs, err := g.readSmall(ctx, key, maxTagObject)
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return v1.Descriptor{}, 0, "", notFound("tag %s:%s", repo, tag)
		}
		return v1.Descriptor{}, 0, "", fmt.Errorf("reading tag %s:%s: %w", repo, tag, err)
	}
	var t tagObject
	if err := json.Unmarshal(b, &t); err != nil || checkDigest(t.Digest) != nil || t.Size <= 0 {
		return v1.Descriptor{}, 0, "", errkind.New(errkind.Integrity, "tag %s:%s: object %s is not a manifest descriptor", repo, tag, key)
	}
	return v1.Descriptor{MediaType: t.MediaType, Size: t.Size, Digest: t.Digest}, attrs.Generation, t.SwapToken, nil
}

func (g *GCS) tagTarget(ctx context.Context, repo, tag string, desc v1.Descriptor) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	if err := ValidateTag(tag); err != nil {
		return v1.Descriptor{}, err
	}
	if err := checkDigest(desc.Digest); err != nil {
		return v1.Descriptor{}, err
	}
	a, err := g.bucket.Object(g.manifestKey(repo, desc.Digest)).Attrs(ctx)
	if err != nil {
		err = gcsErr(err)
		if errors.Is(err, ErrNotFound) {
			return v1.Descriptor{}, notFound("manifest %s in repository %s", desc.Digest, repo)
		}
		return v1.Descriptor{}, err
	}
	if desc.Size != 0 && desc.Size != a.Size {
		return v1.Descriptor{}, errkind.New(errkind.BadInput, "descriptor of %s says %d bytes, the stored manifest has %d", desc.Digest, desc.Size, a.Size)
	}
	return v1.Descriptor{MediaType: types.MediaType(a.ContentType), Size: a.Size, Digest: desc.Digest}, nil
}

// Tag points repo:tag at a manifest present in repo (one object write).
// It refuses reserved tags and tags with a release log (CheckTagWrite).
func (g *GCS) Tag(ctx context.Context, repo, tag string, desc v1.Descriptor) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := CheckTagWrite(ctx, g, repo, tag); err != nil {
		return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
	}
	d, err := g.tagTarget(ctx, repo, tag, desc)
	if err != nil {
		return fmt.Errorf("tagging %s:%s: %w", repo, tag, err)
	}
	b, _ := json.Marshal(tagObject{MediaType: d.MediaType, Digest: d.Digest, Size: d.Size})
	if err := g.writeSmall(ctx, g.tagKey(repo, tag), b, "application/json", nil, nil); err != nil {
		return fmt.Errorf("tagging %s:%s: %w", repo, tag, gcsErr(err))
	}
	return nil
}

// SwapTag points repo:tag at desc only if it points at old now (zero old:
// only if absent), by a write with a generation precondition: a true
// compare-and-swap between any number of writers. A lost race wraps
// ErrConflict (errkind.Conflict).
func (g *GCS) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	if err := checkSwapName(tag); err != nil {
		return fmt.Errorf("swapping %s:%s: %w%w", repo, tag, err, errSwapUntried)
	}
	if old != (v1.Hash{}) {
		if err := checkDigest(old); err != nil {
			return err
		}
	}
	d, err := g.tagTarget(ctx, repo, tag, desc)
	if err != nil {
		return fmt.Errorf("swapping %s:%s: %w%w", repo, tag, err, errSwapUntried)
	}
	cur, gen, _, err := g.readTag(ctx, repo, tag)
	var cond storage.Conditions
	switch {
	case errors.Is(err, ErrNotFound) && old != (v1.Hash{}):
		return errkind.New(errkind.Conflict, "tag %s:%s does not exist, want it at %s: %w", repo, tag, old, ErrConflict)
	case errors.Is(err, ErrNotFound):
		cond = storage.Conditions{DoesNotExist: true}
	case err != nil:
		return fmt.Errorf("swapping %s:%s: %w%w", repo, tag, err, errSwapUntried) // nothing written
	case old == (v1.Hash{}):
		return errkind.New(errkind.Conflict, "tag %s:%s exists (points at %s), want it absent: %w", repo, tag, cur.Digest, ErrConflict)
	case cur.Digest != old:
		return errkind.New(errkind.Conflict, "tag %s:%s points at %s, want %s: %w", repo, tag, cur.Digest, old, ErrConflict)
	default:
		cond = storage.Conditions{GenerationMatch: gen}
	}
	var tok [16]byte
	rand.Read(tok[:])
	token := hex.EncodeToString(tok[:])
	b, _ := json.Marshal(tagObject{MediaType: d.MediaType, Digest: d.Digest, Size: d.Size, SwapToken: token})
	err = g.writeSmall(ctx, g.tagKey(repo, tag), b, "application/json", nil, &cond)
	if err == nil {
		return nil
	}
	if !isPrecondition(err) {
		return fmt.Errorf("swapping %s:%s: %w", repo, tag, gcsErr(err))
	}
	// 412: lost, unless a retried request of ours is what landed first.
	if back, _, backTok, rerr := g.readTag(ctx, repo, tag); rerr == nil && backTok == token && back.Digest == d.Digest {
		return nil
	}
	return errkind.New(errkind.Conflict, "tag %s:%s moved while we swapped it: %w", repo, tag, ErrConflict)
}

// Tags lists repo's tags, sorted.
func (g *GCS) Tags(ctx context.Context, repo string) ([]string, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	prefix := g.key("repositories", repo, "_tags") + "/"
	tags := []string{}
	err := g.eachObject(ctx, prefix, "listing tags of "+repo, func(a *storage.ObjectAttrs) error {
		if t := strings.TrimPrefix(a.Name, prefix); ValidateTag(t) == nil {
			tags = append(tags, t)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	sort.Strings(tags)
	return tags, nil
}

// Repositories lists the repositories that hold a manifest, sorted.
func (g *GCS) Repositories(ctx context.Context) ([]string, error) {
	prefix := g.key("_repositories") + "/"
	repos := []string{}
	err := g.eachObject(ctx, prefix, "listing repositories", func(a *storage.ObjectAttrs) error {
		if r := strings.TrimPrefix(a.Name, prefix); ValidateRepository(r) == nil {
			repos = append(repos, r)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	sort.Strings(repos)
	return repos, nil
}

// Scrub re-reads every blob and verifies it (damage when it does not hash
// to its name), checks that every tag's and referrer link's manifest is
// there (damage: a dangling name), and reports blobs no manifest
// references (hints).
func (g *GCS) Scrub(ctx context.Context, referenced map[v1.Hash]bool) ([]Finding, error) {
	var out []Finding
	add := func(sev, where, format string, args ...any) {
		out = append(out, Finding{Severity: sev, Where: where, Message: fmt.Sprintf(format, args...)})
	}
	prefix := g.key("blobs", "sha256") + "/"
	err := g.eachObject(ctx, prefix, "scrubbing", func(a *storage.ObjectAttrs) error {
		h := strings.TrimPrefix(a.Name, prefix)
		if !hexPattern.MatchString(h) {
			add(SeverityHint, a.Name, "unexpected object: not named by a sha256 digest")
			return nil
		}
		d := v1.Hash{Algorithm: "sha256", Hex: h}
		rc, err := g.Blob(ctx, "scrub", d)
		if err == nil {
			_, err = io.Copy(io.Discard, rc)
			rc.Close()
		}
		if err != nil {
			if !errors.Is(err, ErrDigestMismatch) {
				return fmt.Errorf("scrubbing blob %s: %w", d, err)
			}
			add(SeverityDamage, d.String(), "the blob is corrupt: %v", err)
		}
		if !referenced[d] {
			add(SeverityHint, d.String(), "blob is not referenced by any manifest (left by an interrupted push); it can be collected")
		}
		return nil
	})
	if err != nil {
		return out, err
	}
	repos, err := g.Repositories(ctx)
	if err != nil {
		return out, err
	}
	for _, repo := range repos {
		tags, err := g.Tags(ctx, repo)
		if err != nil {
			return out, err
		}
		for _, tag := range tags {
			d, _, _, err := g.readTag(ctx, repo, tag)
			if err != nil {
				add(SeverityDamage, repo+":"+tag, "tag object unreadable: %v", err)
				continue
			}
			if _, err := g.bucket.Object(g.manifestKey(repo, d.Digest)).Attrs(ctx); err != nil {
				add(SeverityDamage, repo+":"+tag, "tag points at manifest %s, which is missing: %v", d.Digest, gcsErr(err))
			}
		}
	}
	return out, nil
}
