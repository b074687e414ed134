package artifact

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"regexp"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fileio"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/model/safetensors"
	"github.com/modelgate/modelgate/internal/registry"
)

// Artifact is a manifest read from a store.
type Artifact struct {
	Repository string
	Desc       v1.Descriptor
	Raw        []byte
	Manifest   v1.Manifest
}

// Kind is the artifact kind from its artifactType ("" when not ours).
func (a *Artifact) Kind() string { return KindOf(a.Manifest.ArtifactType) }

var artifactTypePattern = regexp.MustCompile(`^application/vnd\.modelgate\.([a-z]+)\.v1$`)

// KindOf returns the kind named by one of our artifactTypes, or "".
func KindOf(artifactType string) string {
	if m := artifactTypePattern.FindStringSubmatch(artifactType); m != nil {
		return m[1]
	}
	return ""
}

// Resolve turns a reference into a manifest descriptor: by digest when it
// has one, else through its tag.
func Resolve(ctx context.Context, store registry.Store, ref registry.Ref) (v1.Descriptor, error) {
	if ref.HasDigest() {
		_, d, err := store.Manifest(ctx, ref.Repository, ref.Digest)
		return d, err
	}
	d, err := store.Resolve(ctx, ref.Repository, ref.Tag)
	if err != nil {
		return v1.Descriptor{}, err
	}
	return d, nil
}

// ReadArtifact reads and parses the manifest ref names.
func ReadArtifact(ctx context.Context, store registry.Store, ref registry.Ref) (*Artifact, error) {
	d, err := Resolve(ctx, store, ref)
	if err != nil {
		return nil, fmt.Errorf("resolving %s: %w", ref, err)
	}
	raw, d, err := store.Manifest(ctx, ref.Repository, d.Digest)
	if err != nil {
		return nil, fmt.Errorf("reading manifest of %s: %w", ref, err)
	}
	a := &Artifact{Repository: ref.Repository, Desc: d, Raw: raw}
	if err := json.Unmarshal(raw, &a.Manifest); err != nil {
		return nil, errkind.New(errkind.Integrity, "manifest %s of %s is not valid JSON: %v", d.Digest, ref, err)
	}
	a.Desc.ArtifactType = a.Manifest.ArtifactType
	return a, nil
}

// ReadBlob reads a whole blob (verified by the store) up to limit bytes.
// The buffer is allocated once at the blob's size, after the store has
// confirmed that size (a manifest cannot make it allocate what the store
// does not hold), and filled by the store's reader, which hashes on a
// second core as it copies.
func ReadBlob(ctx context.Context, store registry.Store, repo string, d v1.Descriptor, limit int64) ([]byte, error) {
	if d.Size > limit {
		return nil, errkind.New(errkind.Integrity, "blob %s claims %d bytes, over the %d-byte limit", d.Digest, d.Size, limit)
	}
	if d.Size < 0 {
		return nil, errkind.New(errkind.Integrity, "blob %s claims a negative size (%d)", d.Digest, d.Size)
	}
	if d.Size > 1<<20 {
		size, err := store.StatBlob(ctx, repo, d.Digest)
		if err != nil {
			return nil, err
		}
		if size != d.Size {
			return nil, errkind.New(errkind.Integrity, "blob %s has %d bytes, its descriptor says %d", d.Digest, size, d.Size)
		}
	}
	rc, err := store.Blob(ctx, repo, d.Digest)
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	w := &sliceWriter{buf: make([]byte, 0, d.Size)}
	if _, err := io.Copy(w, rc); err != nil {
		if errors.Is(err, errTooLong) {
			return nil, errkind.New(errkind.Integrity, "blob %s has more bytes than its descriptor says (%d)", d.Digest, d.Size)
		}
		return nil, fmt.Errorf("reading blob %s: %w", d.Digest, err)
	}
	if int64(len(w.buf)) != d.Size {
		return nil, errkind.New(errkind.Integrity, "blob %s has %d bytes, its descriptor says %d", d.Digest, len(w.buf), d.Size)
	}
	return w.buf, nil
}

var errTooLong = errors.New("more bytes than the buffer holds")

// sliceWriter appends to buf up to its capacity and refuses more.
type sliceWriter struct{ buf []byte }

func (w *sliceWriter) Write(p []byte) (int, error) {
	if len(p) > cap(w.buf)-len(w.buf) {
		return 0, errTooLong
	}
	w.buf = append(w.buf, p...)
	return len(p), nil
}

// MaxBlobSize bounds any single blob modelgate reads into memory.
const MaxBlobSize = 8 << 30

// layerLimit is the most a model layer of the media type may hold when
// read from a store: the limit a model directory has for that file, or
// MaxBlobSize for tensors.
func layerLimit(mt types.MediaType) int64 {
	switch mt {
	case MediaTypeVocabulary:
		return modeldir.MaxVocabSize
	case MediaTypeStats:
		return modeldir.MaxStatsSize
	case MediaTypeProbes:
		return modeldir.MaxProbesSize
	}
	return MaxBlobSize
}

// ReadLimit is the largest blob of media type mt that modelgate's
// readers accept (MaxBlobSize for types without a limit of their own).
func ReadLimit(mt types.MediaType) int64 {
	switch mt {
	case MediaTypeSpec:
		return modeldir.MaxSpecSize
	case MediaTypeHoldoutInfo:
		return MaxHoldoutInfoSize
	}
	return layerLimit(mt)
}

var safeName = regexp.MustCompile(`^[A-Za-z0-9_][A-Za-z0-9_.-]{0,127}$`)

// ModelFiles reads a model artifact's blobs back into the files of its
// model directory (spec.json first), checking the layer titles are plain
// file names. A blob whose descriptor claims more than a model directory
// allows for its file (modeldir's limits; MaxBlobSize for tensors) is
// refused before it is read.
func ModelFiles(ctx context.Context, store registry.Store, a *Artifact) ([]modeldir.File, error) {
	k := a.Kind()
	if k != model.KindEncoder && k != model.KindScorer {
		return nil, errkind.New(errkind.BadInput, "%s@%s is a %q artifact, not a model", a.Repository, a.Desc.Digest, a.Manifest.ArtifactType)
	}
	spec, err := ReadBlob(ctx, store, a.Repository, a.Manifest.Config, modeldir.MaxSpecSize)
	if err != nil {
		return nil, err
	}
	files := []modeldir.File{{Name: modeldir.SpecFile, Bytes: spec}}
	seen := map[string]bool{modeldir.SpecFile: true}
	for _, l := range a.Manifest.Layers {
		name := l.Annotations[AnnotationTitle]
		if !safeName.MatchString(name) || seen[name] {
			return nil, errkind.New(errkind.Integrity, "layer %s of %s has an unsafe or repeated file name %q", l.Digest, a.Desc.Digest, name)
		}
		seen[name] = true
		b, err := ReadBlob(ctx, store, a.Repository, l, layerLimit(l.MediaType))
		if err != nil {
			return nil, err
		}
		files = append(files, modeldir.File{Name: name, Bytes: b})
	}
	return files, nil
}

// Pull writes the model ref names into dir as a model directory (dir is
// created; existing files of the same names are replaced) and validates it.
// Each blob streams from the store (its digest verified as it is read)
// into a temporary file that is synced and renamed into place, so memory
// does not grow with the model and a failed pull leaves no partial file.
func Pull(ctx context.Context, store registry.Store, ref registry.Ref, dir string, opts Options) (*Artifact, error) {
	a, err := ReadArtifact(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	k := a.Kind()
	if k != model.KindEncoder && k != model.KindScorer {
		return nil, errkind.New(errkind.BadInput, "%s is a %q artifact, not a model", ref, a.Manifest.ArtifactType)
	}
	type item struct {
		name string
		desc v1.Descriptor
	}
	items := []item{{modeldir.SpecFile, a.Manifest.Config}}
	seen := map[string]bool{modeldir.SpecFile: true}
	for _, l := range a.Manifest.Layers {
		name := l.Annotations[AnnotationTitle]
		if !safeName.MatchString(name) || seen[name] {
			return nil, errkind.New(errkind.Integrity, "layer %s of %s has an unsafe or repeated file name %q", l.Digest, a.Desc.Digest, name)
		}
		seen[name] = true
		items = append(items, item{name, l})
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, errkind.Wrap(errkind.BadInput, err)
	}
	tensorFiles := map[string]bool{}
	for _, l := range a.Manifest.Layers {
		if l.MediaType == MediaTypeTensors {
			tensorFiles[l.Annotations[AnnotationTitle]] = true
		}
	}
	scans := map[string]*safetensors.Scanner{}
	for _, it := range items {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		opts.emit(Event{Phase: "download", Name: it.name, Total: it.desc.Size})
		var scan *safetensors.Scanner
		if tensorFiles[it.name] {
			scan = safetensors.NewScanner(it.desc.Size)
			scans[it.name] = scan
		}
		if err := pullBlob(ctx, store, a.Repository, it.desc, filepath.Join(dir, it.name), scan, opts, it.name); err != nil {
			return nil, fmt.Errorf("pulling %s: %w", it.name, err)
		}
		opts.emit(Event{Phase: "download", Name: it.name, Done: it.desc.Size, Total: it.desc.Size})
	}
	// The tensor files were checked as they were written; the rest of the
	// directory is small and read back.
	d, err := modeldir.CheckScanned(dir, scans)
	if err != nil {
		return nil, fmt.Errorf("pulled model does not validate: %w", err)
	}
	d.Close()
	return a, nil
}

// pullBlob streams a blob into a temporary file beside path (its digest
// verified by the store's reader, hashing on a second core; write-back to
// disk started as the bytes arrive; scan, when not nil, sees every byte),
// syncs it and renames it to path.
func pullBlob(ctx context.Context, store registry.Store, repo string, d v1.Descriptor, path string, scan *safetensors.Scanner, opts Options, name string) error {
	rc, err := store.Blob(ctx, repo, d.Digest)
	if err != nil {
		return err
	}
	defer rc.Close()
	tmp, err := os.CreateTemp(filepath.Dir(path), ".pull-*")
	if err != nil {
		return err
	}
	defer os.Remove(tmp.Name())
	defer fileio.RemoveOnExit(tmp.Name())()
	var w io.Writer = fileio.NewWriteback(tmp)
	if scan != nil {
		w = io.MultiWriter(w, scan)
	}
	lw := &limitWriter{w: w, left: d.Size, digest: d.Digest, opts: opts, name: name}
	n, err := io.CopyBuffer(lw, rc, make([]byte, fileio.CopyBuffer)) // a reader with WriteTo (the local store's) ignores the buffer
	if err == nil && n != d.Size {
		err = errkind.New(errkind.Integrity, "blob %s has %d bytes, its descriptor says %d", d.Digest, n, d.Size)
	}
	if err == nil {
		err = tmp.Sync()
	}
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Chmod(tmp.Name(), 0o644)
	}
	if err != nil {
		return err
	}
	return os.Rename(tmp.Name(), path)
}

// limitWriter passes at most left bytes to w, refusing more as an
// integrity failure (the store holds a longer blob than the manifest
// says), and reports download progress every progressStep bytes.
type limitWriter struct {
	w          io.Writer
	left       int64
	digest     v1.Hash
	opts       Options
	name       string
	done, last int64
}

func (l *limitWriter) Write(p []byte) (int, error) {
	if int64(len(p)) > l.left {
		return 0, errkind.New(errkind.Integrity, "blob %s has more bytes than its descriptor says", l.digest)
	}
	n, err := l.w.Write(p)
	l.left -= int64(n)
	l.done += int64(n)
	if l.done-l.last >= progressStep {
		l.last = l.done
		l.opts.emit(Event{Phase: "download", Name: l.name, Done: l.done, Total: l.done + l.left})
	}
	return n, err
}

// Loaded is a model read from the store and decoded, ready for the runtime.
type Loaded struct {
	Artifact *Artifact
	Spec     *model.Spec
	Tensors  map[string][]float32
	Vocab    []string
	Probes   []modeldir.Probe
	Stats    map[string]any
	// Encoder is the referenced encoder of a scorer that does not embed it.
	Encoder *Loaded
	// Problems lists what does not match the spec (empty when sound).
	Problems []string
	// EncoderMissing, when set, is why the encoder a scorer references is
	// not in the store (also one of Problems): missing input, not damage
	// of the scorer's own bytes.
	EncoderMissing error
}

// OnlyEncoderMissing reports whether the encoder's absence is l's only
// problem.
func (l *Loaded) OnlyEncoderMissing() bool {
	return l.EncoderMissing != nil && len(l.Problems) == 1
}

// Load reads a model artifact and decodes every blob, checking tensors
// against the spec (shape, dtype, finite values), the vocabulary and the
// probes; a scorer's referenced encoder is loaded too. Problems in the
// content are listed in Loaded.Problems, not returned as an error.
func Load(ctx context.Context, store registry.Store, ref registry.Ref) (*Loaded, error) {
	a, err := ReadArtifact(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	files, err := ModelFiles(ctx, store, a)
	if err != nil {
		return nil, err
	}
	l := &Loaded{Artifact: a, Tensors: map[string][]float32{}}
	spec, vs, err := modeldir.ParseStoredSpec(files[0].Bytes)
	if err != nil {
		return nil, err
	}
	if spec == nil || len(vs) > 0 {
		l.Problems = append(l.Problems, prefixAll("spec: ", vs)...)
		return l, nil
	}
	l.Spec = spec
	byName := map[string][]byte{}
	for _, f := range files[1:] {
		byName[f.Name] = f.Bytes
	}
	byFile := map[string][]model.Tensor{}
	for _, t := range spec.Tensors {
		byFile[t.File] = append(byFile[t.File], t)
	}
	for _, name := range modeldir.TensorFileNames(spec) {
		b, ok := byName[name]
		if !ok {
			l.Problems = append(l.Problems, fmt.Sprintf("%s: tensor file named by the spec is not a layer of the artifact", name))
			continue
		}
		// The blob's buffer is ours alone: F32 tensors are views of it.
		ts, probs := modeldir.DecodeTensorsShared(name, b, byFile[name])
		l.Problems = append(l.Problems, probs...)
		for k, v := range ts {
			l.Tensors[k] = v
		}
	}
	l.checkSmallFiles(spec, byName)
	if spec.Encoder != nil && !spec.Encoder.Embedded {
		loc, err := FindEncoder(ctx, store, spec.Encoder)
		if err != nil && !encoderAbsent(err) {
			return nil, err
		}
		if err != nil {
			l.Problems = append(l.Problems, err.Error())
			l.EncoderMissing = err
		} else {
			enc, err := Load(ctx, store, registry.Ref{Repository: loc.Repository, Digest: loc.Digest})
			if err != nil {
				return nil, fmt.Errorf("loading encoder %s: %w", spec.Encoder.Digest, err)
			}
			l.Encoder = enc
			l.Problems = append(l.Problems, prefixAll("encoder: ", enc.Problems)...)
		}
	}
	return l, nil
}

// checkSmallFiles parses the vocabulary, probes and stats (byName maps
// file names to bytes) into l, listing problems.
func (l *Loaded) checkSmallFiles(spec *model.Spec, byName map[string][]byte) {
	in := spec.Inputs.Sparse[0]
	if b, ok := byName[in.Vocabulary]; ok {
		ids, probs := modeldir.ParseVocabulary(in.Vocabulary, b, in.VocabularySize)
		l.Vocab = ids
		l.Problems = append(l.Problems, probs...)
	} else {
		l.Problems = append(l.Problems, fmt.Sprintf("%s: vocabulary named by the spec is not a layer of the artifact", in.Vocabulary))
	}
	if name := spec.Files.Probes; name != "" {
		if b, ok := byName[name]; ok {
			ps, probs := modeldir.ParseProbes(name, b, spec)
			l.Probes = ps
			l.Problems = append(l.Problems, probs...)
		} else {
			l.Problems = append(l.Problems, fmt.Sprintf("%s: probes named by the spec are not a layer of the artifact", name))
		}
	}
	if name := spec.Files.Stats; name != "" {
		if b, ok := byName[name]; ok {
			if err := json.Unmarshal(b, &l.Stats); err != nil {
				l.Problems = append(l.Problems, fmt.Sprintf("%s: %v", name, err))
			}
		}
	}
}

// CheckModel checks a stored model as Load does (spec; every tensor
// against the spec, values finite; vocabulary, probes, stats; a scorer's
// encoder present) without decoding it: each tensor blob streams through
// a safetensors.Scanner while the store verifies its digest, so memory
// does not grow with the model. A referenced encoder is looked up, not
// checked again (it is a model of its own). Problems in the content are
// returned as a list; an unreadable or damaged blob as an error.
func CheckModel(ctx context.Context, store registry.Store, a *Artifact) ([]string, error) {
	l, err := checkModel(ctx, store, a, false)
	if err != nil {
		return nil, err
	}
	return l.Problems, nil
}

// checkModel is CheckModel returning what it read: the spec, vocabulary,
// probes and stats, no tensors. With deep, a referenced encoder is checked
// the same way (its problems prefixed "encoder: ") and kept in l.Encoder.
func checkModel(ctx context.Context, store registry.Store, a *Artifact, deep bool) (*Loaded, error) {
	k := a.Kind()
	if k != model.KindEncoder && k != model.KindScorer {
		return nil, errkind.New(errkind.BadInput, "%s@%s is a %q artifact, not a model", a.Repository, a.Desc.Digest, a.Manifest.ArtifactType)
	}
	raw, err := ReadBlob(ctx, store, a.Repository, a.Manifest.Config, modeldir.MaxSpecSize)
	if err != nil {
		return nil, err
	}
	l := &Loaded{Artifact: a}
	spec, vs, err := modeldir.ParseStoredSpec(raw)
	if err != nil {
		return nil, err
	}
	if spec == nil || len(vs) > 0 {
		l.Problems = prefixAll("spec: ", vs)
		return l, nil
	}
	l.Spec = spec
	layers := map[string]v1.Descriptor{}
	for _, d := range a.Manifest.Layers {
		name := d.Annotations[AnnotationTitle]
		if _, dup := layers[name]; !safeName.MatchString(name) || dup {
			return nil, errkind.New(errkind.Integrity, "layer %s of %s has an unsafe or repeated file name %q", d.Digest, a.Desc.Digest, name)
		}
		layers[name] = d
	}
	byFile := map[string][]model.Tensor{}
	for _, t := range spec.Tensors {
		byFile[t.File] = append(byFile[t.File], t)
	}
	tensorFiles := map[string]bool{}
	for _, name := range modeldir.TensorFileNames(spec) {
		tensorFiles[name] = true
		d, ok := layers[name]
		if !ok {
			l.Problems = append(l.Problems, fmt.Sprintf("%s: tensor file named by the spec is not a layer of the artifact", name))
			continue
		}
		if d.Size > MaxBlobSize {
			return nil, errkind.New(errkind.Integrity, "layer %s claims %d bytes, more than the %d a tensor file may have", name, d.Size, int64(MaxBlobSize))
		}
		rc, err := store.Blob(ctx, a.Repository, d.Digest)
		if err != nil {
			return nil, err
		}
		sc := safetensors.NewScanner(d.Size)
		_, err = io.Copy(&limitWriter{w: sc, left: d.Size, digest: d.Digest}, rc)
		rc.Close()
		if err != nil {
			return nil, fmt.Errorf("reading %s: %w", name, err)
		}
		l.Problems = append(l.Problems, modeldir.ScanProblems(name, sc, byFile[name])...)
	}
	byName := map[string][]byte{}
	for name, d := range layers {
		if tensorFiles[name] {
			continue
		}
		b, err := ReadBlob(ctx, store, a.Repository, d, layerLimit(d.MediaType))
		if err != nil {
			return nil, err
		}
		byName[name] = b
	}
	l.checkSmallFiles(spec, byName)
	if spec.Encoder != nil && !spec.Encoder.Embedded {
		loc, err := FindEncoder(ctx, store, spec.Encoder)
		switch {
		case err != nil && !encoderAbsent(err):
			return nil, err
		case err != nil:
			l.Problems = append(l.Problems, err.Error())
			l.EncoderMissing = err
		case deep:
			ea, err := ReadArtifact(ctx, store, registry.Ref{Repository: loc.Repository, Digest: loc.Digest})
			if err != nil {
				return nil, fmt.Errorf("reading encoder %s: %w", spec.Encoder.Digest, err)
			}
			enc, err := checkModel(ctx, store, ea, false)
			if err != nil {
				return nil, fmt.Errorf("checking encoder %s: %w", spec.Encoder.Digest, err)
			}
			l.Encoder = enc
			l.Problems = append(l.Problems, prefixAll("encoder: ", enc.Problems)...)
		}
	}
	return l, nil
}

func prefixAll(p string, xs []string) []string {
	out := make([]string, len(xs))
	for i, x := range xs {
		out[i] = p + x
	}
	return out
}

// encoderAbsent reports whether FindEncoder's err says the store lacks the
// encoder (a problem of the stored scorer), rather than that the store
// could not be searched or asked (returned as it is).
func encoderAbsent(err error) bool {
	return errkind.Is(err, errkind.BadInput) && !errors.Is(err, registry.ErrNoCatalog)
}
