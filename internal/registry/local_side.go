package registry

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
	"golang.org/x/sys/unix"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Side files: the record of which manifests a repository holds and which
// manifests refer to which subject, one small file per fact, outside
// index.json (see the Local doc comment for the layout).
const (
	reposDir     = ".modelgate/repos"
	manifestsSub = "manifests"
	referrersSub = "referrers"
	// maxEntrySize bounds a side file read: a manifest's annotations are
	// part of it, and a manifest has at most MaxManifestSize bytes.
	maxEntrySize = MaxManifestSize + 64<<10
	// maxCachedEntries bounds the in-memory copy of side files.
	maxCachedEntries = 1 << 17
)

// repoFolder is the one folder name of a repository under .modelgate/repos:
// '/' becomes '+', which repository names cannot contain, so the mapping is
// one to one and no repository's folder lies inside another's.
func repoFolder(repo string) string { return strings.ReplaceAll(repo, "/", "+") }

// repoOfFolder reverses repoFolder; ok is false for a name no valid
// repository maps to.
func repoOfFolder(name string) (string, bool) {
	r := strings.ReplaceAll(name, "+", "/")
	return r, ValidateRepository(r) == nil && repoFolder(r) == name
}

// typeKey is the folder name of an artifactType among a subject's
// referrers: the type with every byte outside [A-Za-z0-9.+-] (and a
// leading '.') written as %XX, "_" for the empty type, and "sha256=" and
// the type's hex sha256 for a type whose escaped form is over 200 bytes.
// Distinct types give distinct keys (save for sha256 collisions): '_' and
// '=' are always escaped.
func typeKey(at string) string {
	if at == "" {
		return "_"
	}
	var b strings.Builder
	for i := 0; i < len(at); i++ {
		c := at[i]
		keep := c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '+' || c == '-' || c == '.' && i > 0
		if keep {
			b.WriteByte(c)
		} else {
			fmt.Fprintf(&b, "%%%02X", c)
		}
	}
	if b.Len() > 200 {
		sum := sha256.Sum256([]byte(at))
		return "sha256=" + hex.EncodeToString(sum[:])
	}
	return b.String()
}

func (l *Local) repoPath(repo string) string {
	return filepath.Join(l.dir, filepath.FromSlash(reposDir), repoFolder(repo))
}

func (l *Local) manifestsPath(repo string) string {
	return filepath.Join(l.repoPath(repo), manifestsSub)
}

func (l *Local) manifestEntryPath(repo string, d v1.Hash) string {
	return filepath.Join(l.manifestsPath(repo), d.Hex)
}

func (l *Local) referrersPath(repo string, subject v1.Hash) string {
	return filepath.Join(l.repoPath(repo), referrersSub, subject.Hex)
}

func (l *Local) referrerEntryPath(repo string, subject v1.Hash, artifactType string, d v1.Hash) string {
	return filepath.Join(l.referrersPath(repo, subject), typeKey(artifactType), d.Hex)
}

// relPath names a file of the store relative to its directory, with '/'.
func (l *Local) relPath(p string) string {
	if r, err := filepath.Rel(l.dir, p); err == nil {
		return filepath.ToSlash(r)
	}
	return p
}

// sideEntry is the record of a manifest in repo: its descriptor with the
// manifest's annotations (except ref.name and the store's own keys), the
// repository, and the subject digest when it has one. It is also the
// untagged index.json entry of earlier versions of the store; a tag entry
// is this plus ref.name.
func sideEntry(repo string, desc v1.Descriptor, mf manifestFields) v1.Descriptor {
	entry := desc
	entry.Annotations = map[string]string{}
	for k, v := range mf.Annotations {
		if k != annotationRefName && k != annotationRepository && k != annotationSubject {
			entry.Annotations[k] = v
		}
	}
	entry.Annotations[annotationRepository] = repo
	if mf.Subject != nil {
		entry.Annotations[annotationSubject] = mf.Subject.Digest.String()
	}
	return entry
}

// describe returns the descriptor of a parsed manifest: its digest, size,
// media type and artifactType (for an image manifest without one, the
// config media type, the distribution spec's rule for referrers).
func describe(raw []byte, mt types.MediaType, mf manifestFields) v1.Descriptor {
	sum := sha256.Sum256(raw)
	desc := v1.Descriptor{MediaType: mt, Size: int64(len(raw)), Digest: v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(sum[:])}, ArtifactType: mf.ArtifactType}
	if desc.ArtifactType == "" && isImageManifest(mt) {
		desc.ArtifactType = string(mf.Config.MediaType)
	}
	return desc
}

// writeEntry records entry as the manifest file and, when it has a
// subject, the referrer file, unless they exist. The manifest file comes
// first: a referrer file never names a manifest the repository does not
// record. Callers write the manifest blob before (durably, when durable).
// It reports whether it wrote anything.
func (l *Local) writeEntry(repo string, entry v1.Descriptor, durable bool) (bool, error) {
	data, err := json.Marshal(entry)
	if err != nil {
		return false, fmt.Errorf("encoding the record of %s: %w", entry.Digest, err)
	}
	data = append(data, '\n')
	paths := []string{l.manifestEntryPath(repo, entry.Digest)}
	if s := entry.Annotations[annotationSubject]; s != "" {
		subject, err := v1.NewHash(s)
		if err != nil || checkDigest(subject) != nil {
			return false, errkind.New(errkind.BadInput, "manifest %s: subject %q is not a sha256 digest", entry.Digest, s)
		}
		paths = append(paths, l.referrerEntryPath(repo, subject, entry.ArtifactType, entry.Digest))
	}
	wrote := false
	for _, p := range paths {
		// Present: refreshed (Refresher); one the refresh cannot vouch
		// for is written again, with the same content.
		if _, ok, err := refreshFile(p); err == nil && ok {
			continue
		}
		if err := mkdirAll(filepath.Dir(p), durable); err != nil {
			return wrote, fmt.Errorf("recording manifest %s in %s: %w", entry.Digest, repo, err)
		}
		if _, err := l.writeFileAtomic(p, data, durable, false); err != nil {
			return wrote, fmt.Errorf("recording manifest %s in %s: %w", entry.Digest, repo, err)
		}
		// A new file's time comes from the kernel's clock, which lags
		// time.Now (what a refresh writes, e.g. on the manifest blob this
		// writer just reused) by up to a clock tick: stamped with
		// time.Now too, the record is never older than the blob refresh
		// that came before it, which removing the manifest relies on
		// (deleteManifest keeps a blob refreshed after its record). A
		// record moved aside meanwhile is the removal's to judge.
		if _, _, err := refreshFile(p); err != nil {
			return wrote, fmt.Errorf("recording manifest %s in %s: %w", entry.Digest, repo, err)
		}
		wrote = true
	}
	return wrote, nil
}

// mkdirAll creates dir and its missing parents; when durable, it syncs the
// parent of every folder it creates, so that the new entry survives a
// crash.
func mkdirAll(dir string, durable bool) error {
	if !durable {
		return os.MkdirAll(dir, 0o755)
	}
	if fi, err := os.Stat(dir); err == nil {
		if !fi.IsDir() {
			return fmt.Errorf("%s is not a folder", dir)
		}
		return nil
	}
	parent := filepath.Dir(dir)
	if parent == dir {
		return fmt.Errorf("no folder %s", dir)
	}
	if err := mkdirAll(parent, true); err != nil {
		return err
	}
	if err := os.Mkdir(dir, 0o755); err != nil && !errors.Is(err, fs.ErrExist) {
		return err
	}
	return syncDir(parent)
}

// entryCache keeps side files already read. They are written once and
// never changed, so a copy stays right for as long as the file exists;
// callers look a file up only after seeing its name in a folder listing.
type entryCache struct {
	mu sync.Mutex
	m  map[string]v1.Descriptor
}

func (c *entryCache) get(p string) (v1.Descriptor, bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	d, ok := c.m[p]
	return d, ok
}

func (c *entryCache) put(p string, d v1.Descriptor) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.m == nil || len(c.m) >= maxCachedEntries {
		c.m = map[string]v1.Descriptor{}
	}
	c.m[p] = d
}

func (c *entryCache) drop(p string) {
	c.mu.Lock()
	defer c.mu.Unlock()
	delete(c.m, p)
}

// readEntry reads and checks the side file p, which must record manifest
// dgst of repo. A missing file wraps ErrNotFound (errkind.BadInput); a file
// that is not such a record is damage (errkind.Integrity).
func (l *Local) readEntry(p, repo string, dgst v1.Hash) (v1.Descriptor, error) {
	f, err := os.Open(p)
	if errors.Is(err, fs.ErrNotExist) {
		return v1.Descriptor{}, notFound("manifest %s in repository %s", dgst, repo)
	}
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("reading %s: %w", l.relPath(p), err)
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, maxEntrySize+1))
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("reading %s: %w", l.relPath(p), err)
	}
	var d v1.Descriptor
	if len(b) > maxEntrySize {
		return d, errkind.New(errkind.Integrity, "%s: larger than %d bytes", l.relPath(p), maxEntrySize)
	}
	if err := json.Unmarshal(b, &d); err != nil {
		return d, errkind.New(errkind.Integrity, "%s: not a descriptor: %v", l.relPath(p), err)
	}
	switch {
	case d.Digest != dgst:
		return d, errkind.New(errkind.Integrity, "%s: records manifest %s, its name says %s", l.relPath(p), d.Digest, dgst)
	case d.Annotations[annotationRepository] != repo:
		return d, errkind.New(errkind.Integrity, "%s: records repository %q, its folder says %q", l.relPath(p), d.Annotations[annotationRepository], repo)
	case d.Size <= 0 || d.MediaType == "":
		return d, errkind.New(errkind.Integrity, "%s: descriptor without size or media type", l.relPath(p))
	}
	return d, nil
}

// listEntries reads the side files in folder dir (each named by the hex
// digest of the manifest it records), using copies already read. A
// missing folder lists nothing.
func (l *Local) listEntries(dir, repo string) ([]v1.Descriptor, error) {
	ents, err := os.ReadDir(dir)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("listing %s: %w", l.relPath(dir), err)
	}
	out := make([]v1.Descriptor, 0, len(ents))
	for _, e := range ents {
		name := e.Name()
		if !isDigestHex(name) {
			continue // not ours (Scrub reports it)
		}
		p := filepath.Join(dir, name)
		if d, ok := l.entries.get(p); ok {
			out = append(out, d)
			continue
		}
		d, err := l.readEntry(p, repo, v1.Hash{Algorithm: "sha256", Hex: name})
		if errors.Is(err, ErrNotFound) {
			continue // removed since the listing
		}
		if err != nil {
			return nil, err
		}
		l.entries.put(p, d)
		out = append(out, d)
	}
	return out, nil
}

// isDigestHex reports whether s is 64 lower-case hex digits (hexPattern,
// without the regexp's cost on large folders).
func isDigestHex(s string) bool {
	if len(s) != 64 {
		return false
	}
	for i := 0; i < len(s); i++ {
		if c := s[i]; !(c >= '0' && c <= '9' || c >= 'a' && c <= 'f') {
			return false
		}
	}
	return true
}

// hasEntries reports whether folder dir holds at least one side file.
func hasEntries(dir string) (bool, error) {
	f, err := os.Open(dir)
	if errors.Is(err, fs.ErrNotExist) {
		return false, nil
	}
	if err != nil {
		return false, err
	}
	defer f.Close()
	for {
		names, err := f.Readdirnames(64)
		for _, n := range names {
			if isDigestHex(n) {
				return true, nil
			}
		}
		if err == io.EOF {
			return false, nil
		}
		if err != nil {
			return false, err
		}
	}
}

// lookupManifest returns the record of manifest dgst in repo: its side
// file, or else an index.json entry (a tag, or an entry of an earlier
// version of the store that could not be moved out), without ref.name.
func (l *Local) lookupManifest(idx *v1.IndexManifest, repo string, dgst v1.Hash) (v1.Descriptor, error) {
	d, err := l.readEntry(l.manifestEntryPath(repo, dgst), repo, dgst)
	if !errors.Is(err, ErrNotFound) {
		return d, err
	}
	if i := findEntry(idx, repo, dgst); i >= 0 {
		e := idx.Manifests[i]
		e.Annotations = withoutKey(e.Annotations, annotationRefName)
		return e, nil
	}
	return v1.Descriptor{}, err
}

func withoutKey(m map[string]string, key string) map[string]string {
	if _, ok := m[key]; !ok {
		return m
	}
	out := make(map[string]string, len(m))
	for k, v := range m {
		if k != key {
			out[k] = v
		}
	}
	return out
}

// migrate moves the untagged entries that earlier versions of the store
// kept in index.json into side files and drops them from index.json; it
// also records every tagged manifest that has no side file yet. An entry
// is moved only when its manifest blob is present, hashes to its digest
// and parses: others stay in index.json, where Scrub reports them. The
// side files are made durable (one syncfs) before index.json is replaced,
// so a crash at any point leaves every manifest recorded somewhere, and
// running it again finishes the work. Callers hold the lock.
func (l *Local) migrate(ctx context.Context) error {
	idx, err := l.readIndex()
	if err != nil {
		return err
	}
	kept := make([]v1.Descriptor, 0, len(idx.Manifests))
	moved := map[string]bool{} // repo@hex recorded in side files
	wrote, dropped := false, false
	for _, d := range idx.Manifests {
		if err := ctx.Err(); err != nil {
			return err
		}
		repo := d.Annotations[annotationRepository]
		untagged := d.Annotations[annotationRefName] == ""
		if ValidateRepository(repo) != nil || checkDigest(d.Digest) != nil {
			kept = append(kept, d) // another tool's entry
			continue
		}
		key := repo + "@" + d.Digest.Hex
		ok, seen := moved[key]
		if !seen {
			if !untagged {
				if _, err := os.Lstat(l.manifestEntryPath(repo, d.Digest)); err == nil {
					kept = append(kept, d)
					continue
				}
			}
			var w bool
			ok, w, err = l.adopt(repo, d)
			if err != nil {
				return err
			}
			moved[key] = ok
			wrote = wrote || w
		}
		if untagged && ok {
			dropped = true
			continue
		}
		kept = append(kept, d)
	}
	if wrote {
		if err := syncFS(l.dir); err != nil {
			return fmt.Errorf("moving manifest records out of %s: %w", indexFile, err)
		}
	}
	if !dropped {
		return nil
	}
	next := *idx
	next.Manifests = kept
	return l.writeIndex(&next)
}

// needsMigration reports whether migrate would have work to do on idx:
// an untagged entry of ours, or a tagged one without its side file.
func (l *Local) needsMigration(idx *v1.IndexManifest) bool {
	for _, d := range idx.Manifests {
		repo := d.Annotations[annotationRepository]
		if ValidateRepository(repo) != nil || checkDigest(d.Digest) != nil {
			continue
		}
		if d.Annotations[annotationRefName] == "" {
			return true
		}
		if _, err := os.Lstat(l.manifestEntryPath(repo, d.Digest)); err != nil {
			return true
		}
	}
	return false
}

// adopt records the manifest of index entry d in side files, from the
// manifest itself (verified). ok is false when the manifest cannot be
// read, does not match d, or does not parse.
func (l *Local) adopt(repo string, d v1.Descriptor) (ok, wrote bool, err error) {
	raw, err := l.readManifestBlob(d.Digest)
	if err != nil || int64(len(raw)) != d.Size {
		return false, false, nil
	}
	mf, mt, err := parseManifest(d.MediaType, raw)
	if err != nil {
		return false, false, nil
	}
	wrote, err = l.writeEntry(repo, sideEntry(repo, describe(raw, mt, mf), mf), false)
	if err != nil {
		return false, wrote, err
	}
	return true, wrote, nil
}

// syncFS makes every write to the file system holding dir durable.
func syncFS(dir string) error {
	f, err := os.Open(dir)
	if err != nil {
		return err
	}
	defer f.Close()
	return unix.Syncfs(int(f.Fd()))
}
