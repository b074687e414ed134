package registry

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"hash"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"slices"
	"sort"
	"strings"
	"sync"
	"syscall"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fileio"
)

// Annotation keys that the local store writes on index.json entries and
// side files.
const (
	// annotationRepository names the repository an entry belongs to; every
	// entry the store writes carries it.
	annotationRepository = "dev.modelgate.repository"
	// annotationSubject is the subject digest of a manifest that has one.
	annotationSubject = "dev.modelgate.subject"
	// annotationRefName is the OCI image-layout tag annotation. The store
	// writes "REPO:TAG" (the ref.name grammar allows ':' as a separator).
	annotationRefName = "org.opencontainers.image.ref.name"
)

// Names of files and folders inside a local store.
const (
	layoutFile     = "oci-layout"
	indexFile      = "index.json"
	blobsDir       = "blobs/sha256"
	privateDir     = ".modelgate"
	tmpDir         = ".modelgate/tmp"
	lockFile       = ".modelgate/lock"
	layoutVersion  = "1.0.0"
	blobCopyBuffer = 1 << 20
)

// Local is a store in a local directory laid out as an OCI image layout
// (image-spec v1.1, image-layout.md): an `oci-layout` file, `index.json`
// and `blobs/sha256/`, plus modelgate's own records under `.modelgate/`.
// Other OCI tools can read it: every tag is an entry of index.json whose
// org.opencontainers.image.ref.name annotation is "REPO:TAG".
//
// Layout:
//
//	oci-layout                 {"imageLayoutVersion":"1.0.0"}
//	index.json                 an image index of tag entries only
//	blobs/sha256/<hex>         blobs and manifests, shared by all repositories
//	.modelgate/lock            flock(2) target serialising index.json updates
//	.modelgate/tmp/            temporary files of writes in progress
//	.modelgate/repos/<folder>/manifests/<hex>
//	                           one file per manifest put into the repository
//	.modelgate/repos/<folder>/referrers/<subject hex>/<type>/<hex>
//	                           one file per manifest with that subject
//
// <folder> is the repository name with '/' written as '+' (which names
// cannot contain); <type> is the referrer's artifactType with bytes other
// than letters, digits, '.', '+' and '-' written as %XX ("application/x"
// is "application%2Fx"), "_" when it is empty, or "sha256=<hex of the
// type>" when that would be over 200 bytes. Both side files hold the same
// JSON descriptor: media type, size, digest, artifactType (for an image
// manifest without one, its config media type, the distribution spec's
// rule for referrers), the manifest's annotations (except ref.name),
// dev.modelgate.repository, and dev.modelgate.subject when the manifest
// has a subject. A tag entry in index.json is that descriptor plus
// ref.name. So putting an untagged manifest (a report, an approval, a
// release record) writes a blob and one or two small files; Referrers
// reads the subject's folder of that artifactType (without a type, one
// folder per type) and Manifests the repository's manifests folder, so
// their cost follows the size of their answer, not of the store; tags
// are read and moved in index.json, which grows only with the tags.
//
// One directory holds many repositories. index.json entries the store did
// not write (without dev.modelgate.repository, for example added by
// another tool) are ignored and kept as they are. A store written by an
// earlier version of modelgate, which kept one untagged index.json entry
// per manifest, is converted when opened: those entries move to side
// files (each checked against its manifest blob; one that does not match
// stays in index.json, where Scrub reports it).
//
// Other tools name a tag by its ref.name: skopeo reads
// "oci:DIR:REPO:TAG" (it splits DIR off at the first ':', so DIR must not
// contain one). The image-spec ref.name grammar (annotations.md:
// components of [A-Za-z0-9]+ joined by one of -._:@+ or "--") is stricter
// than the distribution spec's names, so a repository with "__" or "---",
// or a tag that starts with '_', ends with '.' or '-', or has two
// separators in a row, is stored and read back by modelgate but refused by
// skopeo as an invalid image name. Untagged manifests are not in
// index.json, so tools that read only the OCI layout see the tagged ones.
//
// Blobs are content-addressed and shared by every repository of the
// directory: Blob, StatBlob and PutBlob validate the repository name but
// do not scope blobs to it. Manifests are scoped: Manifest finds only
// manifests recorded for that repository.
//
// Writes are crash-safe and safe between processes. Every file is written
// to a temporary file in .modelgate/tmp, synced, renamed into place, and
// its folder synced; blobs are verified before the rename. Names come
// last: the manifest blob before its side files, the manifest side file
// before the referrer side file, and a tag only for a manifest whose side
// file and blob are present, so a crash leaves at most a blob or a side
// file that nothing names (Scrub reports them as hints), never a side file
// or a tag naming a missing manifest. Side files are written once, without
// the lock (they are content-addressed and idempotent); index.json is
// replaced atomically under an exclusive flock on .modelgate/lock. Readers
// take no lock and never see a partial file. A Local keeps the parsed
// index.json between calls, revalidated by stat on every call, and side
// files already read.
//
// Errors: missing things wrap ErrNotFound and are marked errkind.BadInput
// (the user named something that is not there); uploads that do not match
// their digest wrap ErrDigestMismatch with errkind.BadInput; stored bytes
// that do not match their digest wrap ErrDigestMismatch with
// errkind.Integrity; a manifest recorded in a side file or index.json whose
// blob is gone wraps ErrNotFound with errkind.Integrity (damage, not a user
// error), as does a side file that is not a valid record; a lost SwapTag
// wraps ErrConflict with errkind.Conflict.
type Local struct {
	dir     string
	mu      sync.Mutex // serialises this process's writers before the flock
	index   indexCache
	entries entryCache
}

var (
	_ Store          = (*Local)(nil)
	_ TagSwapper     = (*Local)(nil)
	_ ManifestLister = (*Local)(nil)
	_ Scrubber       = (*Local)(nil)
)

// OpenLocal opens the local store in dir, creating the directory and an
// empty OCI image layout when they do not exist, and converting a store
// written by an earlier version (see Local). A directory that has an
// oci-layout file of another version is refused.
func OpenLocal(dir string) (*Local, error) {
	abs, err := filepath.Abs(dir)
	if err != nil {
		return nil, fmt.Errorf("opening store %q: %w", dir, err)
	}
	l := &Local{dir: abs}
	if l.ready() {
		// Nothing to create or convert: no lock, so a store the user can
		// only read opens too.
		return l, nil
	}
	for _, d := range []string{blobsDir, tmpDir, reposDir} {
		if err := os.MkdirAll(l.path(d), 0o755); err != nil {
			if l.readOnly(err) {
				return l, nil
			}
			return nil, fmt.Errorf("opening store %q: %w", abs, err)
		}
	}
	unlock, err := l.lock(context.Background())
	if err != nil {
		if l.readOnly(err) {
			return l, nil
		}
		return nil, fmt.Errorf("opening store %q: %w", abs, err)
	}
	defer unlock()

	b, err := os.ReadFile(l.path(layoutFile))
	switch {
	case errors.Is(err, fs.ErrNotExist):
		data, _ := json.Marshal(map[string]string{"imageLayoutVersion": layoutVersion})
		if _, err := l.writeFileAtomic(l.path(layoutFile), data, true, false); err != nil {
			return nil, fmt.Errorf("opening store %q: %w", abs, err)
		}
	case err != nil:
		return nil, fmt.Errorf("opening store %q: %w", abs, err)
	default:
		var lf struct {
			Version string `json:"imageLayoutVersion"`
		}
		if err := json.Unmarshal(b, &lf); err != nil || lf.Version != layoutVersion {
			return nil, errkind.New(errkind.BadInput, "opening store %q: %s is not an OCI image layout version %s file (%.60q)", abs, layoutFile, layoutVersion, b)
		}
	}

	if _, err := os.Stat(l.path(indexFile)); errors.Is(err, fs.ErrNotExist) {
		if err := l.writeIndex(&v1.IndexManifest{SchemaVersion: 2, MediaType: types.OCIImageIndex}); err != nil {
			return nil, fmt.Errorf("opening store %q: %w", abs, err)
		}
	} else if err != nil {
		return nil, fmt.Errorf("opening store %q: %w", abs, err)
	}
	if err := l.migrate(context.Background()); err != nil {
		return nil, fmt.Errorf("opening store %q: %w", abs, err)
	}
	return l, nil
}

// ready reports whether the store needs nothing from OpenLocal: its
// folders, oci-layout file (of our version) and index.json are there, and
// index.json holds nothing an earlier version left to convert.
func (l *Local) ready() bool {
	for _, d := range []string{blobsDir, tmpDir, reposDir} {
		if fi, err := os.Stat(l.path(d)); err != nil || !fi.IsDir() {
			return false
		}
	}
	b, err := os.ReadFile(l.path(layoutFile))
	if err != nil {
		return false
	}
	var lf struct {
		Version string `json:"imageLayoutVersion"`
	}
	if err := json.Unmarshal(b, &lf); err != nil || lf.Version != layoutVersion {
		return false
	}
	idx, err := l.readIndex()
	if err != nil {
		return false
	}
	return !l.needsMigration(idx)
}

// readOnly reports whether err, met while preparing the store for writes,
// says the user may not write there (permissions, a read-only mount) while
// the store can be read as it is: its oci-layout file is ours and its
// index.json parses. Such a store opens for reading; a write fails when it
// is tried, naming the file.
func (l *Local) readOnly(err error) bool {
	if !errors.Is(err, fs.ErrPermission) && !errors.Is(err, syscall.EROFS) {
		return false
	}
	b, rerr := os.ReadFile(l.path(layoutFile))
	var lf struct {
		Version string `json:"imageLayoutVersion"`
	}
	if rerr != nil || json.Unmarshal(b, &lf) != nil || lf.Version != layoutVersion {
		return false
	}
	_, ierr := l.readIndex()
	return ierr == nil
}

// Dir returns the store's directory as an absolute path.
func (l *Local) Dir() string { return l.dir }

// String names the store as skopeo's oci transport would: "oci:DIR".
func (l *Local) String() string { return "oci:" + l.dir }

func (l *Local) path(rel string) string { return filepath.Join(l.dir, filepath.FromSlash(rel)) }

func (l *Local) blobPath(h v1.Hash) string { return filepath.Join(l.dir, "blobs", "sha256", h.Hex) }

// checkDigest refuses anything but a well-formed sha256 digest; the hex
// part becomes a file name, so this also keeps paths inside blobs/.
func checkDigest(h v1.Hash) error {
	if h.Algorithm != "sha256" || !digestPattern.MatchString(h.String()) {
		return errkind.New(errkind.BadInput, "invalid digest %q: want sha256: and 64 lower-case hex digits", h.String())
	}
	return nil
}

func notFound(format string, args ...any) error {
	return errkind.New(errkind.BadInput, "%s: %w", fmt.Sprintf(format, args...), ErrNotFound)
}

// ---- blobs ----

// Blob opens a blob. The reader hashes what it reads; at end of file it
// returns an error wrapping ErrDigestMismatch (errkind.Integrity) instead
// of io.EOF when the bytes do not hash to dgst.
func (l *Local) Blob(ctx context.Context, repo string, dgst v1.Hash) (io.ReadCloser, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := checkDigest(dgst); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	f, size, err := l.openBlob(dgst)
	if err != nil {
		return nil, err
	}
	return &verifyingReader{ctx: ctx, f: f, size: size, h: sha256.New(), want: dgst}, nil
}

// openBlob opens a blob file, refusing anything but a regular file.
func (l *Local) openBlob(dgst v1.Hash) (*os.File, int64, error) {
	p := l.blobPath(dgst)
	fi, err := os.Lstat(p)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, 0, notFound("blob %s", dgst)
	}
	if err != nil {
		return nil, 0, fmt.Errorf("reading blob %s: %w", dgst, err)
	}
	if !fi.Mode().IsRegular() {
		return nil, 0, errkind.New(errkind.Integrity, "blob %s: %s is not a regular file", dgst, p)
	}
	f, err := os.Open(p)
	if err != nil {
		return nil, 0, fmt.Errorf("reading blob %s: %w", dgst, err)
	}
	return f, fi.Size(), nil
}

// StatBlob returns a present blob's size (of the file; its content is
// verified on read and by Scrub).
func (l *Local) StatBlob(ctx context.Context, repo string, dgst v1.Hash) (int64, error) {
	if err := ValidateRepository(repo); err != nil {
		return 0, err
	}
	if err := checkDigest(dgst); err != nil {
		return 0, err
	}
	if err := ctx.Err(); err != nil {
		return 0, err
	}
	return l.statBlob(dgst)
}

func (l *Local) statBlob(dgst v1.Hash) (int64, error) {
	fi, err := os.Lstat(l.blobPath(dgst))
	if errors.Is(err, fs.ErrNotExist) {
		return 0, notFound("blob %s", dgst)
	}
	if err != nil {
		return 0, fmt.Errorf("stat blob %s: %w", dgst, err)
	}
	if !fi.Mode().IsRegular() {
		return 0, errkind.New(errkind.Integrity, "blob %s is not a regular file", dgst)
	}
	return fi.Size(), nil
}

// PutBlob streams r into the store, hashing and counting as it writes.
// Bytes that do not hash to dgst or are not exactly size long are refused
// with ErrDigestMismatch (errkind.BadInput) and leave nothing behind. A
// blob already present with that size is kept and r is not read; a present
// file of another size is damage and is replaced by the verified upload.
func (l *Local) PutBlob(ctx context.Context, repo string, dgst v1.Hash, size int64, r io.Reader) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := checkDigest(dgst); err != nil {
		return err
	}
	if size < 0 {
		return errkind.New(errkind.BadInput, "blob %s: negative size %d", dgst, size)
	}
	return l.writeBlob(ctx, dgst, size, r)
}

func (l *Local) writeBlob(ctx context.Context, dgst v1.Hash, size int64, r io.Reader) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	// Present: refreshed, so that a collection that judged it old keeps
	// it (Refresher). A blob the refresh cannot vouch for is written again.
	if fi, ok, err := refreshFile(l.blobPath(dgst)); err == nil && ok && fi.Size() == size {
		return nil
	}
	st, err := l.stage(ctx, size, r)
	if err != nil {
		return fmt.Errorf("writing blob %s: %w", dgst, err)
	}
	if st.digest != dgst {
		st.Discard()
		return errkind.New(errkind.BadInput, "writing blob %s: %w: content hashes to %s", dgst, ErrDigestMismatch, st.digest)
	}
	_, err = st.Commit(ctx)
	return err
}

// StageBlob implements BlobStager: the bytes go to a temporary file under
// .modelgate/tmp, hashed on a second core as they are written, with
// write-back to disk started as they arrive; Commit syncs and renames it
// into blobs/sha256/.
func (l *Local) StageBlob(ctx context.Context, repo string, size int64, r io.Reader) (StagedBlob, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if size < 0 {
		return nil, errkind.New(errkind.BadInput, "staging blob: negative size %d", size)
	}
	st, err := l.stage(ctx, size, r)
	if err != nil {
		return nil, fmt.Errorf("staging blob: %w", err)
	}
	return st, nil
}

func (l *Local) stage(ctx context.Context, size int64, r io.Reader) (_ *localStaged, err error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	f, err := os.CreateTemp(l.path(tmpDir), "blob-*")
	if err != nil {
		return nil, err
	}
	forget := fileio.RemoveOnExit(f.Name())
	defer func() {
		if err != nil {
			f.Close()
			os.Remove(f.Name())
			forget()
		}
	}()
	h := sha256.New()
	n, err := fileio.CopyHashing(ctx, fileio.NewWriteback(f), io.LimitReader(r, size+1), h)
	if err != nil {
		return nil, err
	}
	if n != size {
		return nil, errkind.New(errkind.BadInput, "%w: got %d bytes, want %d", ErrDigestMismatch, n, size)
	}
	step(stepBlobWritten)
	return &localStaged{l: l, f: f, tmp: f.Name(), size: size, forget: forget,
		digest: v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(h.Sum(nil))}}, nil
}

// localStaged is a blob in a temporary file of a local store. It is not
// safe for concurrent use.
type localStaged struct {
	l       *Local
	f       *os.File // open until Commit or Discard
	tmp     string   // its name
	forget  func()   // unregisters tmp from fileio.RemoveOnExit
	size    int64
	digest  v1.Hash
	state   int // stagedOpen, stagedCommitted, stagedDiscarded
	existed bool
}

const (
	stagedOpen = iota
	stagedCommitted
	stagedDiscarded
)

var _ StagedReader = (*localStaged)(nil)

// ReadAt reads the staged bytes (before Commit or Discard only).
func (s *localStaged) ReadAt(p []byte, off int64) (int, error) {
	if s.state != stagedOpen || s.f == nil {
		return 0, fmt.Errorf("reading staged blob %s: it was committed or discarded", s.digest)
	}
	return s.f.ReadAt(p, off)
}

func (s *localStaged) Digest() v1.Hash { return s.digest }
func (s *localStaged) Size() int64     { return s.size }

func (s *localStaged) Commit(ctx context.Context) (existed bool, err error) {
	switch s.state {
	case stagedCommitted:
		return s.existed, nil
	case stagedDiscarded:
		return false, fmt.Errorf("committing blob %s: it was discarded", s.digest)
	}
	if err := ctx.Err(); err != nil {
		return false, err
	}
	final := s.l.blobPath(s.digest)
	if fi, ok, err := refreshFile(final); err == nil && ok && fi.Size() == s.size {
		// Present, and refreshed (see writeBlob).
		s.Discard()
		s.state, s.existed = stagedCommitted, true
		return true, nil
	}
	tmp := s.tmp
	defer func() {
		if err != nil {
			s.Discard()
			err = fmt.Errorf("writing blob %s: %w", s.digest, err)
		}
	}()
	if err := s.f.Sync(); err != nil {
		return false, err
	}
	step(stepBlobSynced)
	err = s.f.Close()
	s.f = nil
	if err != nil {
		return false, err
	}
	if err := os.Chmod(tmp, 0o644); err != nil {
		return false, err
	}
	if err := os.Rename(tmp, final); err != nil {
		return false, err
	}
	step(stepBlobRenamed)
	s.forget()
	s.state = stagedCommitted
	if err := syncDir(filepath.Dir(final)); err != nil {
		return false, err
	}
	return false, nil
}

func (s *localStaged) Discard() error {
	if s.state != stagedOpen {
		return nil
	}
	s.state = stagedDiscarded
	if s.f != nil {
		s.f.Close()
		s.f = nil
	}
	defer s.forget()
	return os.Remove(s.tmp)
}

// verifyingReader hashes what it reads and turns io.EOF into an integrity
// error when the content does not hash to want.
type verifyingReader struct {
	ctx  context.Context
	f    *os.File
	size int64 // the file's size when opened
	h    hash.Hash
	n    int64
	want v1.Hash
	err  error // sticky: io.EOF or the mismatch
}

func (r *verifyingReader) Read(p []byte) (int, error) {
	if r.err != nil {
		return 0, r.err
	}
	n, err := r.f.Read(p)
	r.h.Write(p[:n])
	r.n += int64(n)
	if err == io.EOF {
		err = r.finish()
	} else if err != nil {
		err = fmt.Errorf("reading blob %s: %w", r.want, err)
	}
	return n, err
}

func (r *verifyingReader) finish() error {
	if got := hex.EncodeToString(r.h.Sum(nil)); got != r.want.Hex {
		r.err = errkind.New(errkind.Integrity, "reading blob %s: %w: stored content hashes to sha256:%s (%d bytes)", r.want, ErrDigestMismatch, got, r.n)
	} else {
		r.err = io.EOF
	}
	return r.err
}

// WriteTo copies the rest of the blob to w in large chunks, hashing on a
// second core while it writes, and verifies it: it returns the mismatch
// error instead of nil when the content is wrong.
func (r *verifyingReader) WriteTo(w io.Writer) (int64, error) {
	if r.err != nil {
		if r.err == io.EOF {
			return 0, nil
		}
		return 0, r.err
	}
	var n int64
	var err error
	if rest := r.size - r.n; rest < fileio.CopyBuffer {
		// A small blob: one buffer of its size, hashed inline (a second
		// core and its buffers would cost more than they save).
		buf := make([]byte, rest+1) // one more byte shows a file that grew
		k, rerr := io.ReadFull(r.f, buf)
		if rerr == io.EOF || rerr == io.ErrUnexpectedEOF {
			rerr = nil
		}
		r.h.Write(buf[:k])
		if rerr == nil {
			k, rerr = w.Write(buf[:k])
		}
		n, err = int64(k), rerr
		if err == nil && k == len(buf) {
			// Longer than when it was opened: hash the rest, so the
			// digest check below judges the whole file.
			var m int64
			m, err = fileio.CopyHashing(r.ctx, w, r.f, r.h)
			n += m
		}
	} else {
		n, err = fileio.CopyHashing(r.ctx, w, r.f, r.h)
	}
	r.n += n
	if err != nil {
		r.err = fmt.Errorf("reading blob %s: %w", r.want, err)
		return n, r.err
	}
	if ferr := r.finish(); ferr != io.EOF {
		return n, ferr
	}
	return n, nil
}

func (r *verifyingReader) Close() error { return r.f.Close() }

// ---- manifests ----

// manifestFields are the parts of an image manifest or index that the
// store looks at.
type manifestFields struct {
	SchemaVersion int64             `json:"schemaVersion"`
	MediaType     types.MediaType   `json:"mediaType"`
	ArtifactType  string            `json:"artifactType"`
	Config        *v1.Descriptor    `json:"config"`
	Layers        []v1.Descriptor   `json:"layers"`
	Manifests     []v1.Descriptor   `json:"manifests"`
	Subject       *v1.Descriptor    `json:"subject"`
	Annotations   map[string]string `json:"annotations"`
}

func isImageManifest(mt types.MediaType) bool {
	return mt == types.OCIManifestSchema1 || mt == types.DockerManifestSchema2
}

func isIndexManifest(mt types.MediaType) bool {
	return mt == types.OCIImageIndex || mt == types.DockerManifestList
}

// PutManifest stores a manifest in repo. It accepts OCI (and Docker
// schema 2) image manifests and indexes up to MaxManifestSize bytes of
// JSON, with schemaVersion 2 and, when the JSON names a mediaType, the same
// one as mediaType (which may be empty to take the JSON's). An image
// manifest's config and layers must be present blobs of the sizes the
// manifest says; an index's manifests must be present in repo; the error
// names every missing digest and wraps ErrNotFound. The subject need not
// exist. Putting a manifest already in repo changes nothing.
func (l *Local) PutManifest(ctx context.Context, repo string, mediaType types.MediaType, raw []byte) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	if err := ctx.Err(); err != nil {
		return v1.Descriptor{}, err
	}
	mf, mt, err := parseManifest(mediaType, raw)
	if err != nil {
		return v1.Descriptor{}, err
	}
	desc := describe(raw, mt, mf)
	dgst := desc.Digest
	entry := sideEntry(repo, desc, mf)
	// Already recorded: its side file is refreshed (Refresher), so that a
	// collection that judged it old keeps it.
	if _, ok, err := refreshFile(l.manifestEntryPath(repo, dgst)); err == nil && ok && l.recorded(repo, entry) {
		if size, err := l.statBlob(dgst); err == nil && size == desc.Size {
			return desc, nil
		}
	}
	if err := l.checkReferences(ctx, repo, mt, mf); err != nil {
		return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", dgst, repo, err)
	}
	if err := l.writeBlob(ctx, dgst, int64(len(raw)), bytes.NewReader(raw)); err != nil {
		return v1.Descriptor{}, err
	}
	if _, err := l.writeEntry(repo, entry, true); err != nil {
		return v1.Descriptor{}, fmt.Errorf("putting manifest %s into %s: %w", dgst, repo, err)
	}
	return desc, nil
}

// recorded reports whether entry's side files are all present.
func (l *Local) recorded(repo string, entry v1.Descriptor) bool {
	if _, err := os.Lstat(l.manifestEntryPath(repo, entry.Digest)); err != nil {
		return false
	}
	if s := entry.Annotations[annotationSubject]; s != "" {
		subject, err := v1.NewHash(s)
		if err != nil {
			return false
		}
		if _, err := os.Lstat(l.referrerEntryPath(repo, subject, entry.ArtifactType, entry.Digest)); err != nil {
			return false
		}
	}
	return true
}

// parseManifest checks raw is a manifest the store accepts and returns its
// fields and media type.
func parseManifest(mediaType types.MediaType, raw []byte) (manifestFields, types.MediaType, error) {
	var mf manifestFields
	if len(raw) > MaxManifestSize {
		return mf, "", errkind.New(errkind.BadInput, "manifest of %d bytes is larger than %d bytes", len(raw), MaxManifestSize)
	}
	if err := json.Unmarshal(raw, &mf); err != nil {
		return mf, "", errkind.New(errkind.BadInput, "manifest is not valid JSON of a manifest: %w", err)
	}
	if mf.SchemaVersion != 2 {
		return mf, "", errkind.New(errkind.BadInput, "manifest has schemaVersion %d, want 2", mf.SchemaVersion)
	}
	mt := mediaType
	switch {
	case mt == "":
		mt = mf.MediaType
	case mf.MediaType != "" && mf.MediaType != mt:
		return mf, "", errkind.New(errkind.BadInput, "manifest says mediaType %q but was put as %q", mf.MediaType, mt)
	}
	switch {
	case isImageManifest(mt):
		if mf.Config == nil {
			return mf, "", errkind.New(errkind.BadInput, "image manifest has no config")
		}
		if err := checkDigest(mf.Config.Digest); err != nil {
			return mf, "", errkind.New(errkind.BadInput, "manifest config: %w", err)
		}
		for i, d := range mf.Layers {
			if err := checkDigest(d.Digest); err != nil {
				return mf, "", errkind.New(errkind.BadInput, "manifest layer %d: %w", i, err)
			}
		}
	case isIndexManifest(mt):
		for i, d := range mf.Manifests {
			if err := checkDigest(d.Digest); err != nil {
				return mf, "", errkind.New(errkind.BadInput, "index manifest %d: %w", i, err)
			}
		}
	default:
		return mf, "", errkind.New(errkind.BadInput, "unsupported manifest media type %q", mt)
	}
	if mf.Subject != nil {
		if err := checkDigest(mf.Subject.Digest); err != nil {
			return mf, "", errkind.New(errkind.BadInput, "manifest subject: %w", err)
		}
	}
	return mf, mt, nil
}

// checkReferences applies checkRefs with the store's own lookups. Each
// blob is refreshed (Refresher): a manifest is never put naming a blob a
// collection is removing, however its writer checked for the blob.
func (l *Local) checkReferences(ctx context.Context, repo string, mt types.MediaType, mf manifestFields) error {
	var idx *v1.IndexManifest
	return checkRefs(mt, mf, func(d v1.Hash) (int64, error) { return l.refreshBlob(ctx, d, true) }, func(d v1.Hash) error {
		if idx == nil {
			var err error
			if idx, err = l.readIndex(); err != nil {
				return err
			}
		}
		_, err := l.lookupManifest(idx, repo, d)
		return err
	})
}

// Manifest returns the bytes of a manifest recorded in repo, read through
// a MaxManifestSize limit and verified against dgst (a mismatch wraps
// ErrDigestMismatch with errkind.Integrity).
func (l *Local) Manifest(ctx context.Context, repo string, dgst v1.Hash) ([]byte, v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, v1.Descriptor{}, err
	}
	if err := checkDigest(dgst); err != nil {
		return nil, v1.Descriptor{}, err
	}
	if err := ctx.Err(); err != nil {
		return nil, v1.Descriptor{}, err
	}
	idx, err := l.readIndex()
	if err != nil {
		return nil, v1.Descriptor{}, err
	}
	entry, err := l.lookupManifest(idx, repo, dgst)
	if err != nil {
		return nil, v1.Descriptor{}, err
	}
	desc := plainDescriptor(entry)
	raw, err := l.readManifestBlob(dgst)
	if err != nil {
		return nil, v1.Descriptor{}, err
	}
	if int64(len(raw)) != desc.Size {
		return nil, v1.Descriptor{}, errkind.New(errkind.Integrity, "reading manifest %s: %w: %d bytes stored, its record says %d", dgst, ErrDigestMismatch, len(raw), desc.Size)
	}
	return raw, desc, nil
}

// readManifestBlob reads and verifies a manifest's blob.
func (l *Local) readManifestBlob(dgst v1.Hash) ([]byte, error) {
	f, _, err := l.openBlob(dgst)
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return nil, errkind.New(errkind.Integrity, "manifest %s is recorded but its blob is missing: %w", dgst, ErrNotFound)
		}
		return nil, err
	}
	defer f.Close()
	raw, err := io.ReadAll(io.LimitReader(f, MaxManifestSize+1))
	if err != nil {
		return nil, fmt.Errorf("reading manifest %s: %w", dgst, err)
	}
	if len(raw) > MaxManifestSize {
		return nil, errkind.New(errkind.Integrity, "reading manifest %s: %w: stored manifest is larger than %d bytes", dgst, ErrDigestMismatch, MaxManifestSize)
	}
	sum := sha256.Sum256(raw)
	if got := hex.EncodeToString(sum[:]); got != dgst.Hex {
		return nil, errkind.New(errkind.Integrity, "reading manifest %s: %w: stored content hashes to sha256:%s", dgst, ErrDigestMismatch, got)
	}
	return raw, nil
}

// Manifests lists every manifest recorded in repo, tagged or not, sorted
// by digest, with the manifest's artifactType and annotations.
func (l *Local) Manifests(ctx context.Context, repo string) ([]v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	idx, err := l.readIndex()
	if err != nil {
		return nil, err
	}
	side, err := l.listEntries(l.manifestsPath(repo), repo)
	if err != nil {
		return nil, err
	}
	return collectManifests(side, idx, func(d v1.Descriptor) bool {
		return d.Annotations[annotationRepository] == repo
	}), nil
}

// collectManifests returns one descriptor per distinct digest among side
// and the index.json entries keep accepts, sorted by digest.
func collectManifests(side []v1.Descriptor, idx *v1.IndexManifest, keep func(v1.Descriptor) bool) []v1.Descriptor {
	seen := make(map[v1.Hash]bool, len(side))
	out := make([]v1.Descriptor, 0, len(side))
	add := func(d v1.Descriptor) {
		if !seen[d.Digest] {
			seen[d.Digest] = true
			out = append(out, annotatedDescriptor(d))
		}
	}
	for _, d := range side {
		add(d)
	}
	for _, d := range idx.Manifests {
		if keep(d) {
			add(d)
		}
	}
	slices.SortFunc(out, func(a, b v1.Descriptor) int {
		if c := strings.Compare(a.Digest.Algorithm, b.Digest.Algorithm); c != 0 {
			return c
		}
		return strings.Compare(a.Digest.Hex, b.Digest.Hex)
	})
	return out
}

// Referrers lists the manifests in repo whose subject is subject, sorted
// by digest, optionally only those of one artifactType. Descriptors carry
// the referrer's artifactType and annotations (except ref.name).
func (l *Local) Referrers(ctx context.Context, repo string, subject v1.Hash, artifactType string) ([]v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := checkDigest(subject); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	idx, err := l.readIndex()
	if err != nil {
		return nil, err
	}
	dir := l.referrersPath(repo, subject)
	var folders []string
	if artifactType != "" {
		folders = []string{typeKey(artifactType)}
	} else {
		ents, err := os.ReadDir(dir)
		if err != nil && !errors.Is(err, fs.ErrNotExist) {
			return nil, fmt.Errorf("listing %s: %w", l.relPath(dir), err)
		}
		for _, e := range ents {
			folders = append(folders, e.Name())
		}
	}
	var side []v1.Descriptor
	for _, t := range folders {
		ds, err := l.listEntries(filepath.Join(dir, t), repo)
		if err != nil {
			return nil, err
		}
		side = append(side, ds...)
	}
	s := subject.String()
	match := func(d v1.Descriptor) bool {
		return d.Annotations[annotationRepository] == repo && d.Annotations[annotationSubject] == s &&
			(artifactType == "" || d.ArtifactType == artifactType)
	}
	kept := side[:0]
	for _, d := range side {
		if match(d) {
			kept = append(kept, d)
		}
	}
	return collectManifests(kept, idx, match), nil
}

// plainDescriptor is an entry without annotations.
func plainDescriptor(d v1.Descriptor) v1.Descriptor {
	return v1.Descriptor{MediaType: d.MediaType, Size: d.Size, Digest: d.Digest, ArtifactType: d.ArtifactType}
}

// annotatedDescriptor is an entry with the manifest's own annotations (the
// store's bookkeeping annotations removed).
func annotatedDescriptor(d v1.Descriptor) v1.Descriptor {
	out := plainDescriptor(d)
	for k, v := range d.Annotations {
		if k == annotationRefName || k == annotationRepository || k == annotationSubject {
			continue
		}
		if out.Annotations == nil {
			out.Annotations = map[string]string{}
		}
		out.Annotations[k] = v
	}
	return out
}

// ---- tags ----

func refName(repo, tag string) string { return repo + ":" + tag }

// Resolve returns the descriptor (media type, size, digest, artifactType)
// of the manifest that repo:tag points at.
func (l *Local) Resolve(ctx context.Context, repo, tag string) (v1.Descriptor, error) {
	if err := ValidateRepository(repo); err != nil {
		return v1.Descriptor{}, err
	}
	if err := ValidateTag(tag); err != nil {
		return v1.Descriptor{}, err
	}
	if err := ctx.Err(); err != nil {
		return v1.Descriptor{}, err
	}
	idx, err := l.readIndex()
	if err != nil {
		return v1.Descriptor{}, err
	}
	if i := findTag(idx, repo, tag); i >= 0 {
		return plainDescriptor(idx.Manifests[i]), nil
	}
	return v1.Descriptor{}, notFound("tag %s", refName(repo, tag))
}

// Tag points repo:tag at the manifest desc.Digest, which must already be
// in repo (else ErrNotFound). A non-zero desc.Size must match the
// manifest's. The change is one atomic replace of index.json.
//
// It refuses reserved tags and tags with a release log (see
// CheckTagWrite); the release-log check runs under the store's lock, so
// no release can start between it and the write.
func (l *Local) Tag(ctx context.Context, repo, tag string, desc v1.Descriptor) error {
	if err := CheckTagName(tag); err != nil {
		return err
	}
	return l.setTag(ctx, repo, tag, nil, desc)
}

// SwapTag points repo:tag at desc only if it now points at old, or, when
// old is the zero Hash, only if the tag does not exist. The check and the
// update happen under the store's lock; a lost race wraps ErrConflict
// (errkind.Conflict) and changes nothing.
func (l *Local) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	if err := checkSwapName(tag); err != nil {
		return err
	}
	if old != (v1.Hash{}) {
		if err := checkDigest(old); err != nil {
			return err
		}
	}
	return l.setTag(ctx, repo, tag, &old, desc)
}

func (l *Local) setTag(ctx context.Context, repo, tag string, old *v1.Hash, desc v1.Descriptor) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := ValidateTag(tag); err != nil {
		return err
	}
	if err := checkDigest(desc.Digest); err != nil {
		return err
	}
	ref := refName(repo, tag)
	err := l.updateIndex(ctx, func(idx *v1.IndexManifest) (bool, error) {
		cur := findTag(idx, repo, tag)
		if old == nil && ValidateTag(HeadTag(tag)) == nil && findTag(idx, repo, HeadTag(tag)) >= 0 {
			return false, guardedError(repo, tag)
		}
		if old != nil {
			switch {
			case *old == (v1.Hash{}) && cur >= 0:
				return false, errkind.New(errkind.Conflict, "tag %s exists (points at %s), want it absent: %w", ref, idx.Manifests[cur].Digest, ErrConflict)
			case *old != (v1.Hash{}) && cur < 0:
				return false, errkind.New(errkind.Conflict, "tag %s does not exist, want it at %s: %w", ref, *old, ErrConflict)
			case *old != (v1.Hash{}) && idx.Manifests[cur].Digest != *old:
				return false, errkind.New(errkind.Conflict, "tag %s points at %s, want %s: %w", ref, idx.Manifests[cur].Digest, *old, ErrConflict)
			}
		}
		entry, err := l.lookupManifest(idx, repo, desc.Digest)
		if err != nil {
			return false, err
		}
		if desc.Size != 0 && desc.Size != entry.Size {
			return false, errkind.New(errkind.BadInput, "descriptor of %s says %d bytes, the stored manifest has %d", desc.Digest, desc.Size, entry.Size)
		}
		if size, err := l.statBlob(desc.Digest); err != nil || size != entry.Size {
			return false, errkind.New(errkind.Integrity, "manifest %s is recorded in %s but its blob is missing or of the wrong size", desc.Digest, repo)
		}
		if cur >= 0 && idx.Manifests[cur].Digest == desc.Digest {
			return false, nil
		}
		tagged := entry
		tagged.Annotations = map[string]string{}
		for k, v := range entry.Annotations {
			tagged.Annotations[k] = v
		}
		tagged.Annotations[annotationRefName] = ref
		// One entry per ref.name: drop every entry with this name, also one
		// another tool may have written without our repository annotation.
		kept := idx.Manifests[:0]
		for _, d := range idx.Manifests {
			if d.Annotations[annotationRefName] != ref {
				kept = append(kept, d)
			}
		}
		idx.Manifests = append(kept, tagged)
		return true, nil
	})
	if err != nil {
		return fmt.Errorf("tagging %s: %w", ref, err)
	}
	return nil
}

// Untag removes repo:tag, whatever it is: it applies none of DeleteTag's
// guards (reserved names, release logs, the expected target), so it is
// for tests that damage a store on purpose; everything else removes tags
// with DeleteTag. The manifest stays in the repository (its side file
// remains). A missing tag wraps ErrNotFound.
func (l *Local) Untag(ctx context.Context, repo, tag string) error {
	if err := ValidateRepository(repo); err != nil {
		return err
	}
	if err := ValidateTag(tag); err != nil {
		return err
	}
	ref := refName(repo, tag)
	err := l.updateIndex(ctx, func(idx *v1.IndexManifest) (bool, error) {
		if findTag(idx, repo, tag) < 0 {
			return false, notFound("tag %s", ref)
		}
		kept := idx.Manifests[:0]
		for _, d := range idx.Manifests {
			if !(d.Annotations[annotationRepository] == repo && d.Annotations[annotationRefName] == ref) {
				kept = append(kept, d)
			}
		}
		idx.Manifests = kept
		return true, nil
	})
	if err != nil {
		return fmt.Errorf("untagging %s: %w", ref, err)
	}
	return nil
}

// Tags lists repo's tags, sorted. A repository with no manifests gives an
// error wrapping ErrNotFound; one with manifests but no tags gives an
// empty list.
func (l *Local) Tags(ctx context.Context, repo string) ([]string, error) {
	if err := ValidateRepository(repo); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	idx, err := l.readIndex()
	if err != nil {
		return nil, err
	}
	known := false
	tags := []string{}
	prefix := repo + ":"
	for _, d := range idx.Manifests {
		if d.Annotations[annotationRepository] != repo {
			continue
		}
		known = true
		if t, ok := strings.CutPrefix(d.Annotations[annotationRefName], prefix); ok && ValidateTag(t) == nil {
			tags = append(tags, t)
		}
	}
	if !known {
		has, err := hasEntries(l.manifestsPath(repo))
		if err != nil {
			return nil, fmt.Errorf("listing tags of %s: %w", repo, err)
		}
		if !has {
			return nil, notFound("repository %s", repo)
		}
	}
	sort.Strings(tags)
	return compactStrings(tags), nil
}

// Repositories lists the repositories that hold at least one manifest,
// sorted.
func (l *Local) Repositories(ctx context.Context) ([]string, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	idx, err := l.readIndex()
	if err != nil {
		return nil, err
	}
	repos := []string{}
	for _, d := range idx.Manifests {
		if r, ok := d.Annotations[annotationRepository]; ok && ValidateRepository(r) == nil {
			repos = append(repos, r)
		}
	}
	ents, err := os.ReadDir(l.path(reposDir))
	if err != nil && !errors.Is(err, fs.ErrNotExist) {
		return nil, fmt.Errorf("listing repositories: %w", err)
	}
	for _, e := range ents {
		r, ok := repoOfFolder(e.Name())
		if !ok {
			continue
		}
		has, err := hasEntries(l.manifestsPath(r))
		if err != nil {
			return nil, fmt.Errorf("listing repositories: %w", err)
		}
		if has {
			repos = append(repos, r)
		}
	}
	sort.Strings(repos)
	return compactStrings(repos), nil
}

func compactStrings(s []string) []string {
	out := s[:0]
	for i, v := range s {
		if i == 0 || v != s[i-1] {
			out = append(out, v)
		}
	}
	return out
}

// findEntry returns the index of an entry of repo for dgst, preferring the
// untagged one, or -1.
func findEntry(idx *v1.IndexManifest, repo string, dgst v1.Hash) int {
	found := -1
	for i, d := range idx.Manifests {
		if d.Digest != dgst || d.Annotations[annotationRepository] != repo {
			continue
		}
		if d.Annotations[annotationRefName] == "" {
			return i
		}
		if found < 0 {
			found = i
		}
	}
	return found
}

// findTag returns the index of repo:tag's entry, or -1.
func findTag(idx *v1.IndexManifest, repo, tag string) int {
	ref := refName(repo, tag)
	for i := len(idx.Manifests) - 1; i >= 0; i-- {
		d := idx.Manifests[i]
		if d.Annotations[annotationRepository] == repo && d.Annotations[annotationRefName] == ref {
			return i
		}
	}
	return -1
}
