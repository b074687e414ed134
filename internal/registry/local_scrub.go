package registry

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"regexp"

	v1 "github.com/google/go-containerregistry/pkg/v1"
)

var hexPattern = regexp.MustCompile(`^[a-f0-9]{64}$`)

// Scrub checks the store's files. Damage: a blob whose content does not
// hash to its name, an index.json entry whose blob is missing or of another
// size (for a tag entry: a dangling tag), an unreadable index.json or
// oci-layout. Hints: leftover temporary files in .modelgate/tmp (an
// interrupted write, or one in progress now), unexpected files in
// blobs/sha256, and blobs that are neither in referenced nor a manifest
// recorded in index.json. Findings come in a stable order: layout files,
// blobs by name, index entries in file order, temporary files by name.
// The error is non-nil only when the check itself could not run (for
// example ctx was cancelled); what it found so far is returned with it.
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
	for _, e := range ents {
		if err := ctx.Err(); err != nil {
			return out, err
		}
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
		sum, n, err := hashFile(filepath.Join(dir, name))
		if err != nil {
			damage(where, "cannot read blob: %v", err)
			continue
		}
		present[name] = n
		if sum != name {
			damage(where, "content hashes to sha256:%s (%d bytes): the blob is corrupt", sum, n)
		}
	}

	isManifest := map[string]bool{}
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
		isManifest[d.Digest.Hex] = true
		size, ok := present[d.Digest.Hex]
		switch {
		case !ok:
			damage(where, "index.json names manifest %s but its blob is missing", d.Digest)
		case size != d.Size:
			damage(where, "index.json says manifest %s has %d bytes, its blob has %d", d.Digest, d.Size, size)
		}
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
