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
	"regexp"
	"runtime"
	"strings"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
)

var hexPattern = regexp.MustCompile(`^[a-f0-9]{64}$`)

// scrubListedHook, when set (only by this package's tests), runs after
// Scrub has listed and hashed the blobs and before it reads the side files:
// a test puts a manifest there, as a push running beside verify does.
var scrubListedHook func()

// Scrub checks the store's files. Damage: a blob whose content does not
// hash to its name; a side file that is not a valid record of the
// manifest its name and folder say, that records other fields than the
// manifest has (artifactType, annotations, subject), or whose manifest
// blob is missing or of another size; a referrer side file with no
// manifest side file or that differs from it; an
// index.json entry whose blob is missing or of another size (for a tag
// entry: a dangling tag); two or more index.json entries for one tag; an
// unreadable index.json or oci-layout. Hints:
// leftover temporary files in .modelgate/tmp (an interrupted write, or one
// in progress now); a manifest side file whose referrer side file is
// missing (an interrupted put: putting the manifest again completes it);
// unexpected files in blobs/sha256 or .modelgate/repos; blobs that are
// neither in referenced nor a recorded manifest. Findings come in a stable
// order: layout files, blobs by name, side files by repository and name,
// index entries in file order, unreferenced blobs by name, temporary files
// by name. The error is non-nil only when the check itself could not run
// (for example ctx was cancelled); what it found so far is returned with
// it.
func (l *Local) Scrub(ctx context.Context, referenced map[v1.Hash]bool) ([]Finding, error) {
	var out []Finding
	damage := func(where, format string, args ...any) {
		out = append(out, Finding{Severity: SeverityDamage, Where: where, Message: fmt.Sprintf(format, args...)})
	}
	hint := func(where, format string, args ...any) {
		out = append(out, Finding{Severity: SeverityHint, Where: where, Message: fmt.Sprintf(format, args...)})
	}

	if b, err := os.ReadFile(l.path(layoutFile)); err != nil {
		damage(layoutFile, "cannot read: %v", err)
	} else {
		var lf struct {
			Version string `json:"imageLayoutVersion"`
		}
		if err := json.Unmarshal(b, &lf); err != nil || lf.Version != layoutVersion {
			damage(layoutFile, "not an OCI image layout %s file", layoutVersion)
		}
	}
	idx, err := l.readIndex()
	if err != nil {
		damage(indexFile, "%v", err)
		idx = &v1.IndexManifest{}
	}

	present := map[string]int64{}
	dir := l.path(blobsDir)
	ents, err := os.ReadDir(dir)
	if err != nil {
		return out, fmt.Errorf("scrubbing %s: %w", dir, err)
	}
	// Blobs are hashed by one worker per CPU; findings keep name order.
	type hashed struct {
		sum string
		n   int64
		err error
	}
	results := make([]hashed, len(ents))
	jobs := make(chan int)
	var wg sync.WaitGroup
	for range max(1, min(runtime.GOMAXPROCS(0), len(ents))) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range jobs {
				results[i].sum, results[i].n, results[i].err = hashFile(filepath.Join(dir, ents[i].Name()))
			}
		}()
	}
	for i, e := range ents {
		if ctx.Err() != nil {
			break
		}
		if hexPattern.MatchString(e.Name()) && e.Type().IsRegular() {
			jobs <- i
		}
	}
	close(jobs)
	wg.Wait()
	if err := ctx.Err(); err != nil {
		return out, err
	}
	for i, e := range ents {
		name := e.Name()
		where := "blobs/sha256/" + name
		if !hexPattern.MatchString(name) {
			hint(where, "unexpected file: not named by a sha256 digest")
			continue
		}
		where = "sha256:" + name
		if !e.Type().IsRegular() {
			damage(where, "blob is not a regular file")
			continue
		}
		r := results[i]
		if r.err != nil {
			damage(where, "cannot read blob: %v", r.err)
			continue
		}
		present[name] = r.n
		if r.sum != name {
			damage(where, "content hashes to sha256:%s (%d bytes): the blob is corrupt", r.sum, r.n)
		}
	}

	if scrubListedHook != nil {
		scrubListedHook()
	}
	isManifest := map[string]bool{}
	checkBlob := func(where, what string, d v1.Descriptor) {
		isManifest[d.Digest.Hex] = true
		size, ok := present[d.Digest.Hex]
		if !ok {
			// The blobs were listed before the side files are read: a
			// manifest put since (a push running beside verify) has its
			// blob written before its side file, so look again.
			if st, err := os.Lstat(l.blobPath(d.Digest)); err == nil && st.Mode().IsRegular() {
				size, ok = st.Size(), true
			}
		}
		switch {
		case !ok:
			damage(where, "%s names manifest %s but its blob is missing", what, d.Digest)
		case size != d.Size:
			damage(where, "%s says manifest %s has %d bytes, its blob has %d", what, d.Digest, d.Size, size)
		}
	}

	mark := func(hex string) { isManifest[hex] = true }
	if err := l.scrubSideFiles(ctx, hint, damage, checkBlob, mark); err != nil {
		return out, err
	}

	// One entry per tag: modelgate replaces a tag's entry, but another
	// tool (or a hand edit) can add a second one, which readers then take
	// instead of the first.
	entries := map[string][]v1.Descriptor{}
	var refOrder []string
	for _, d := range idx.Manifests {
		if ref := d.Annotations[annotationRefName]; ref != "" {
			if len(entries[ref]) == 0 {
				refOrder = append(refOrder, ref)
			}
			entries[ref] = append(entries[ref], d)
		}
	}
	for _, ref := range refOrder {
		es := entries[ref]
		if len(es) < 2 {
			continue
		}
		distinct := map[v1.Hash]bool{}
		var list []string
		for _, e := range es {
			if !distinct[e.Digest] {
				list = append(list, e.Digest.String())
			}
			distinct[e.Digest] = true
		}
		if len(distinct) == 1 {
			damage(ref, "index.json has %d entries for this tag, all pointing at %s: delete all but one of them from index.json (modelgate writes one entry per tag)", len(es), list[0])
			continue
		}
		damage(ref, "index.json has %d entries for this tag pointing at different manifests (%s; readers take the last): keep only the right entry in index.json — for a tag with a release log, the one `modelgate log %s` says its newest record released — and delete the others", len(es), strings.Join(list, ", "), ref)
	}

	for _, d := range idx.Manifests {
		repo := d.Annotations[annotationRepository]
		ref := d.Annotations[annotationRefName]
		where := repo + "@" + d.Digest.String()
		switch {
		case ref != "":
			where = ref
		case repo == "":
			where = "index.json entry " + d.Digest.String()
		}
		if d.Digest.Algorithm != "sha256" || !hexPattern.MatchString(d.Digest.Hex) {
			hint(where, "entry digest %q is not sha256; not checked", d.Digest.String())
			continue
		}
		checkBlob(where, "index.json", d)
	}

	for _, e := range ents {
		name := e.Name()
		if _, ok := present[name]; !ok || isManifest[name] {
			continue
		}
		if !referenced[v1.Hash{Algorithm: "sha256", Hex: name}] {
			hint("sha256:"+name, "blob is not referenced by any manifest (left by an interrupted push or a removed manifest); it can be collected")
		}
	}

	tmps, err := os.ReadDir(l.path(tmpDir))
	if err != nil {
		return out, fmt.Errorf("scrubbing %s: %w", tmpDir, err)
	}
	for _, e := range tmps {
		hint(tmpDir+"/"+e.Name(), "leftover temporary file (an interrupted write, or one in progress now); it can be removed when no modelgate process is writing")
	}
	return out, nil
}

type reportFunc func(where, format string, args ...any)

// scrubSideFiles checks every file under .modelgate/repos, calls checkBlob
// for every manifest a manifest side file records, and mark for the digest
// every side file is named by (its blob is a manifest, not a leftover,
// even when the side file is damaged).
func (l *Local) scrubSideFiles(ctx context.Context, hint, damage reportFunc, checkBlob func(where, what string, d v1.Descriptor), mark func(hex string)) error {
	root := l.path(reposDir)
	repoDirs, err := os.ReadDir(root)
	if err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return nil
		}
		return fmt.Errorf("scrubbing %s: %w", reposDir, err)
	}
	unexpected := func(p string) { hint(l.relPath(p), "unexpected file: not part of the store's layout") }
	for _, rd := range repoDirs {
		repo, ok := repoOfFolder(rd.Name())
		rp := filepath.Join(root, rd.Name())
		if !ok || !rd.IsDir() {
			unexpected(rp)
			continue
		}
		subs, err := os.ReadDir(rp)
		if err != nil {
			damage(l.relPath(rp), "cannot list: %v", err)
			continue
		}
		for _, sub := range subs {
			if n := sub.Name(); !sub.IsDir() || (n != manifestsSub && n != referrersSub) {
				unexpected(filepath.Join(rp, n))
			}
		}

		recorded := map[string]v1.Descriptor{} // valid manifest side files by hex
		manifests, err := os.ReadDir(filepath.Join(rp, manifestsSub))
		if err != nil && !errors.Is(err, fs.ErrNotExist) {
			damage(l.relPath(filepath.Join(rp, manifestsSub)), "cannot list: %v", err)
		}
		for _, e := range manifests {
			if err := ctx.Err(); err != nil {
				return err
			}
			p := filepath.Join(rp, manifestsSub, e.Name())
			if !hexPattern.MatchString(e.Name()) {
				unexpected(p)
				continue
			}
			mark(e.Name())
			d, err := l.readEntry(p, repo, v1.Hash{Algorithm: "sha256", Hex: e.Name()})
			if err != nil {
				damage(l.relPath(p), "%v", err)
				continue
			}
			where := repo + "@" + d.Digest.String()
			checkBlob(where, "side file "+l.relPath(p), d)
			if want, ok := l.expectedEntry(repo, d); ok && !sameJSON(want, d) {
				damage(l.relPath(p), "does not match manifest %s: it records %s, the manifest gives %s", d.Digest, jsonText(d), jsonText(want))
				continue
			}
			recorded[d.Digest.Hex] = d
			if s := d.Annotations[annotationSubject]; s != "" {
				subject, err := v1.NewHash(s)
				if err != nil || checkDigest(subject) != nil {
					damage(l.relPath(p), "subject %q is not a sha256 digest", s)
					continue
				}
				if _, err := os.Lstat(l.referrerEntryPath(repo, subject, d.ArtifactType, d.Digest)); err != nil {
					hint(where, "manifest has subject %s but no referrer side file (an interrupted put; putting the manifest again completes it)", subject)
				}
			}
		}

		refRoot := filepath.Join(rp, referrersSub)
		subjects, err := os.ReadDir(refRoot)
		if err != nil && !errors.Is(err, fs.ErrNotExist) {
			damage(l.relPath(refRoot), "cannot list: %v", err)
		}
		for _, sd := range subjects {
			sp := filepath.Join(refRoot, sd.Name())
			if !sd.IsDir() || !hexPattern.MatchString(sd.Name()) {
				unexpected(sp)
				continue
			}
			subject := "sha256:" + sd.Name()
			typeDirs, err := os.ReadDir(sp)
			if err != nil {
				damage(l.relPath(sp), "cannot list: %v", err)
				continue
			}
			for _, td := range typeDirs {
				tp := filepath.Join(sp, td.Name())
				if !td.IsDir() {
					unexpected(tp)
					continue
				}
				files, err := os.ReadDir(tp)
				if err != nil {
					damage(l.relPath(tp), "cannot list: %v", err)
					continue
				}
				for _, e := range files {
					if err := ctx.Err(); err != nil {
						return err
					}
					p := filepath.Join(tp, e.Name())
					if !hexPattern.MatchString(e.Name()) {
						unexpected(p)
						continue
					}
					mark(e.Name())
					d, err := l.readEntry(p, repo, v1.Hash{Algorithm: "sha256", Hex: e.Name()})
					switch {
					case err != nil:
						damage(l.relPath(p), "%v", err)
					case d.Annotations[annotationSubject] != subject || typeKey(d.ArtifactType) != td.Name():
						damage(l.relPath(p), "records a manifest with subject %q and artifactType %q, not the ones its folders say", d.Annotations[annotationSubject], d.ArtifactType)
					default:
						if _, err := os.Lstat(l.manifestEntryPath(repo, d.Digest)); err != nil {
							damage(l.relPath(p), "referrer %s is not recorded in repository %s (no side file %s)", d.Digest, repo, l.relPath(l.manifestEntryPath(repo, d.Digest)))
						} else if m, ok := recorded[d.Digest.Hex]; ok && !sameJSON(m, d) {
							damage(l.relPath(p), "differs from the manifest's side file: it records %s", jsonText(d))
						}
					}
				}
			}
		}
	}
	return nil
}

// expectedEntry is the side file the store writes for manifest d of repo,
// computed from the manifest blob; ok is false when the blob is missing,
// corrupt or does not parse (findings of their own).
func (l *Local) expectedEntry(repo string, d v1.Descriptor) (v1.Descriptor, bool) {
	raw, err := l.readManifestBlob(d.Digest)
	if err != nil {
		return v1.Descriptor{}, false // the missing or damaged blob is reported on its own
	}
	mf, mt, err := parseManifest(d.MediaType, raw)
	if err != nil {
		// The record's media type does not fit the manifest: judge it
		// against the media type the manifest gives itself. A blob that is
		// no manifest at all gives an expectation nothing can match.
		if mf, mt, err = parseManifest("", raw); err != nil {
			return v1.Descriptor{MediaType: "(not a manifest: " + types.MediaType(err.Error()) + ")"}, true
		}
	}
	return sideEntry(repo, describe(raw, mt, mf), mf), true
}

func sameJSON(a, b v1.Descriptor) bool { return jsonText(a) == jsonText(b) }

func jsonText(d v1.Descriptor) string {
	b, err := json.Marshal(d)
	if err != nil {
		return fmt.Sprintf("%+v", d)
	}
	return string(b)
}

// hashFile returns the hex sha256 and size of a file's content.
func hashFile(p string) (string, int64, error) {
	f, err := os.Open(p)
	if err != nil {
		return "", 0, err
	}
	defer f.Close()
	h := sha256.New()
	n, err := io.CopyBuffer(h, struct{ io.Reader }{f}, make([]byte, blobCopyBuffer)) // hide WriteTo so the large buffer is used
	if err != nil {
		return "", n, err
	}
	return hex.EncodeToString(h.Sum(nil)), n, nil
}
