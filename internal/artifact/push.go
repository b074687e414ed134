package artifact

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"sort"
	"strings"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fileio"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/model/safetensors"
	"github.com/modelgate/modelgate/internal/registry"
)

// MediaTypeManifest is the OCI image manifest media type; every artifact
// modelgate writes is one.
const MediaTypeManifest types.MediaType = "application/vnd.oci.image.manifest.v1+json"

// Standard annotation keys (OCI image-spec annotations.md).
const (
	AnnotationCreated  = "org.opencontainers.image.created"
	AnnotationSource   = "org.opencontainers.image.source"
	AnnotationRevision = "org.opencontainers.image.revision"
	AnnotationTitle    = "org.opencontainers.image.title"
	AnnotationVersion  = "org.opencontainers.image.version"
)

// Event is a progress event of a long operation; Done and Total count bytes.
type Event struct {
	Phase string `json:"phase"` // "upload", "skip", "manifest", "tag", "download"
	Name  string `json:"name"`
	Done  int64  `json:"done"`
	Total int64  `json:"total"`
}

// Options tune push and pull.
type Options struct {
	// Progress receives events; nil means none.
	Progress func(Event)
	// ClusterColumn (holdouts) names the column grouping rows that are not
	// independent, for example the listener id; "" for none.
	ClusterColumn string
	// TagCheck, when set, is called just before the tag is written, with
	// the manifest it is to name; an error leaves the manifest untagged
	// (retention collects it) and is returned.
	TagCheck func(ctx context.Context, ref registry.Ref, manifest v1.Hash) error
}

func (o Options) emit(e Event) {
	if o.Progress != nil {
		o.Progress(e)
	}
}

// Blob is one blob to upload: its bytes, or a blob already staged in the
// store (registry.BlobStager) that PushArtifact commits.
type Blob struct {
	Desc   v1.Descriptor
	Bytes  []byte
	Staged registry.StagedBlob
	// uploaded says a blob without Bytes was put in the store by the
	// caller just before (it counts as written, not skipped).
	uploaded bool
}

// NewBlob describes b with the given media type.
func NewBlob(mt types.MediaType, b []byte, annotations map[string]string) Blob {
	return newBlobSum(mt, b, sha256.Sum256(b), annotations)
}

func newBlobSum(mt types.MediaType, b []byte, sum [32]byte, annotations map[string]string) Blob {
	return Blob{
		Desc: v1.Descriptor{MediaType: mt, Size: int64(len(b)),
			Digest: v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(sum[:])}, Annotations: annotations},
		Bytes: b,
	}
}

// PushResult says what a push wrote.
type PushResult struct {
	Ref          string        `json:"ref"`
	Digest       string        `json:"digest"`
	Kind         string        `json:"kind"`
	Manifest     v1.Descriptor `json:"manifest"`
	BlobsWritten int           `json:"blobsWritten"`
	BlobsSkipped int           `json:"blobsSkipped"`
	BytesWritten int64         `json:"bytesWritten"`
	// ManifestReused is true when an identical artifact was already in the
	// repository and only the tag moved.
	ManifestReused bool `json:"manifestReused"`
	// EncoderPinned is set when the scorer's directory named its encoder
	// by NAME:TAG only: the digest the tag pointed at, which the stored
	// spec names.
	EncoderPinned *EncoderPin `json:"encoderPinned,omitempty"`
}

// EncoderPin is the encoder a push resolved a scorer's NAME:TAG to.
type EncoderPin struct {
	Name   string `json:"name"`
	Digest string `json:"digest"`
}

// PushModelDir validates the model directory at dir and pushes it to
// store as ref (NAME:TAG). A scorer that references its encoder by digest
// must find that encoder in the store.
//
// A model's manifest is a pure function of its directory: pushing the same
// directory anywhere gives the same digest (the creation time comes from
// the spec's lineage, not the clock).
func PushModelDir(ctx context.Context, store registry.Store, dir string, ref registry.Ref, opts Options) (*PushResult, error) {
	if ref.Tag == "" || ref.HasDigest() {
		return nil, errkind.New(errkind.BadInput, "push needs NAME:TAG, got %q", ref.String())
	}
	if err := registry.CheckTagWrite(ctx, store, ref.Repository, ref.Tag); err != nil {
		return nil, err
	}
	if stager, ok := store.(registry.BlobStager); ok {
		return pushStaged(ctx, store, stager, dir, ref, opts)
	}
	d, err := modeldir.CheckForPush(dir)
	if err != nil {
		return nil, err
	}
	defer d.Close()
	pin, err := pinEncoder(ctx, store, d)
	if err != nil {
		return nil, err
	}
	if err := checkModelRefs(ctx, store, d); err != nil {
		return nil, err
	}
	config, layers, ann, err := modelBlobs(d, nil)
	if err != nil {
		return nil, err
	}
	res, err := PushArtifact(ctx, store, ref, ArtifactType(d.Model.Spec.Kind), config, layers, nil, ann, opts)
	if res != nil {
		res.EncoderPinned = pin
	}
	return res, err
}

// pinEncoder resolves the encoder of a scorer whose directory names it by
// NAME:TAG (or NAME@DIGEST) without a digest: the digest goes into the
// spec, and the spec bytes stored become the directory's spec.json with
// encoder.digest set (keys sorted, numbers as written). A spec that names
// a digest is stored as it is.
func pinEncoder(ctx context.Context, store registry.Store, d *modeldir.Dir) (*EncoderPin, error) {
	e := d.Model.Spec.Encoder
	if e == nil || e.Digest != "" {
		return nil, nil
	}
	ref, err := registry.ParseRef(e.Name, false)
	if err != nil || (ref.Tag == "" && !ref.HasDigest()) {
		return nil, errkind.New(errkind.BadInput, "model directory %s: %s /encoder/name %q: without encoder.digest, name the encoder as NAME:TAG", d.Path, modeldir.SpecFile, e.Name)
	}
	dg := ref.Digest
	if !ref.HasDigest() {
		desc, err := store.Resolve(ctx, ref.Repository, ref.Tag)
		if errors.Is(err, registry.ErrNotFound) {
			return nil, errkind.New(errkind.BadInput, "model directory %s: %s /encoder/name: the encoder tag %s does not exist in the store: push the encoder first", d.Path, modeldir.SpecFile, e.Name)
		}
		if err != nil {
			return nil, err
		}
		dg = desc.Digest
	}
	raw, err := setEncoderDigest(d.SpecBytes, dg.String())
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "model directory %s: %s: %v", d.Path, modeldir.SpecFile, err)
	}
	spec, vs, err := modeldir.ParseStoredSpec(raw)
	if err != nil {
		return nil, err
	}
	if spec == nil || len(vs) > 0 {
		return nil, errkind.New(errkind.BadInput, "model directory %s: %s with the encoder pinned: %s", d.Path, modeldir.SpecFile, strings.Join(vs, "; "))
	}
	d.SpecBytes, d.Model.Spec = raw, spec
	return &EncoderPin{Name: e.Name, Digest: dg.String()}, nil
}

// setEncoderDigest returns the spec JSON with encoder.digest set, indented
// and with a final newline; numbers keep their written form.
func setEncoderDigest(raw []byte, digest string) ([]byte, error) {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var doc map[string]any
	if err := dec.Decode(&doc); err != nil {
		return nil, err
	}
	enc, ok := doc["encoder"].(map[string]any)
	if !ok {
		return nil, fmt.Errorf("/encoder is not an object")
	}
	enc["digest"] = digest
	var out bytes.Buffer
	w := json.NewEncoder(&out)
	w.SetEscapeHTML(false)
	w.SetIndent("", "  ")
	if err := w.Encode(doc); err != nil {
		return nil, err
	}
	return out.Bytes(), nil
}

// checkModelRefs checks what a model directory needs from the store: a
// scorer's encoder present, and the layer graph sound against it.
func checkModelRefs(ctx context.Context, store registry.Store, d *modeldir.Dir) error {
	spec := d.Model.Spec
	if spec.Encoder != nil && !spec.Encoder.Embedded {
		if _, err := FindEncoder(ctx, store, spec.Encoder); err != nil {
			return err
		}
	}
	return checkGraph(ctx, store, d)
}

// pushStaged pushes through a store that stages blobs. The tensor files
// the spec names stream into the store while the rest of the directory
// (spec, headers, vocabulary, stats, probes, graph) is checked on the
// side; any problem discards what was staged. The same bytes are hashed,
// written and scanned once.
func pushStaged(ctx context.Context, store registry.Store, stager registry.BlobStager, dir string, ref registry.Ref, opts Options) (*PushResult, error) {
	type checked struct {
		d   *modeldir.Dir
		err error
	}
	done := make(chan checked, 1)
	// pin is the encoder resolved from NAME:TAG; origSpec the directory's
	// spec.json as checked (the stored spec differs when pin is set).
	var pin *EncoderPin
	var origSpec []byte
	go func() {
		d, err := modeldir.CheckHeaders(dir)
		if err == nil {
			origSpec = d.SpecBytes
			pin, err = pinEncoder(ctx, store, d)
			if err == nil {
				err = checkModelRefs(ctx, store, d)
			}
			if err != nil {
				d.Close()
			}
		}
		done <- checked{d, err}
	}()
	// Which files to stream: from the spec as it is now; the check on the
	// side must agree (same spec bytes, same sizes) or nothing is kept.
	files, specBytes := tensorFilesOf(dir)
	tensors, scans, serr := stageFiles(ctx, stager, ref.Repository, dir, files, opts)
	discard := func() {
		for _, b := range tensors {
			b.Staged.Discard() // a no-op once committed
		}
	}
	defer discard()
	c := <-done
	if c.err != nil {
		if errkind.Of(c.err) == errkind.BadInput {
			// List every problem, values too, as the full check does.
			full, ferr := modeldir.Check(dir)
			if errors.Is(ferr, modeldir.ErrChangedWhileRead) {
				return nil, errkind.New(errkind.BadInput, "model directory %s: a tensor file changed while it was pushed; push again once it is written:\n%v", dir, ferr)
			}
			if ferr != nil {
				return nil, ferr
			}
			full.Close()
		}
		return nil, c.err
	}
	d := c.d
	defer d.Close()
	if serr != nil {
		return nil, serr
	}
	if !bytes.Equal(specBytes, origSpec) || len(d.TensorFiles) != len(files) {
		return nil, errkind.New(errkind.BadInput, "model directory %s: %s changed while it was pushed; push again once it is written", dir, modeldir.SpecFile)
	}
	for i, f := range d.TensorFiles {
		if f.Name != files[i].name || f.Size != files[i].size {
			return nil, errkind.New(errkind.BadInput, "model directory %s: %s changed while it was pushed; push again once it is written", dir, f.Name)
		}
	}
	if err := d.CheckScans(scans); err != nil {
		return nil, err
	}
	config, layers, ann, err := modelBlobs(d, tensors)
	if err != nil {
		return nil, err
	}
	res, err := PushArtifact(ctx, store, ref, ArtifactType(d.Model.Spec.Kind), config, layers, nil, ann, opts)
	if res != nil {
		res.EncoderPinned = pin
	}
	return res, err
}

type tensorFile struct {
	name string
	size int64
}

// tensorFilesOf lists the tensor files a model directory's spec names,
// with their sizes, and the spec's bytes; nil when the spec or a file
// cannot be read (the check on the side reports why).
func tensorFilesOf(dir string) ([]tensorFile, []byte) {
	raw, err := fileio.ReadInDir(dir, modeldir.SpecFile, modeldir.MaxSpecSize)
	if err != nil {
		return nil, nil
	}
	spec, vs, err := modeldir.ParseSpec(raw)
	if err != nil || spec == nil || len(vs) > 0 {
		return nil, nil
	}
	var out []tensorFile
	for _, name := range modeldir.TensorFileNames(spec) {
		f, st, err := fileio.OpenInDir(dir, name)
		if err != nil {
			return nil, nil
		}
		f.Close()
		out = append(out, tensorFile{name, st.Size()})
	}
	return out, raw
}

// stageFiles streams each tensor file into the store once: the store
// hashes and writes the bytes while a safetensors.Scanner checks the same
// bytes. What was staged is returned even with an error (the caller
// discards it).
func stageFiles(ctx context.Context, stager registry.BlobStager, repo, dir string, files []tensorFile, opts Options) ([]Blob, map[string]*safetensors.Scanner, error) {
	var staged []Blob
	scans := map[string]*safetensors.Scanner{}
	for _, f := range files {
		sc := safetensors.NewScanner(f.size)
		in, _, err := fileio.OpenInDir(dir, f.name)
		if err != nil {
			return staged, nil, errkind.New(errkind.BadInput, "model directory %s: %w", dir, err)
		}
		opts.emit(Event{Phase: "upload", Name: f.name, Total: f.size})
		r := io.TeeReader(&progressReader{r: in, opts: opts, name: f.name, total: f.size}, sc)
		sb, err := stager.StageBlob(ctx, repo, f.size, r)
		in.Close()
		if errors.Is(err, registry.ErrDigestMismatch) {
			return staged, nil, errkind.New(errkind.BadInput, "model directory %s: %s changed while it was pushed (%v); push again once it is written", dir, f.name, err)
		}
		if err != nil {
			return staged, nil, fmt.Errorf("uploading %s: %w", f.name, err)
		}
		scans[f.name] = sc
		staged = append(staged, Blob{Desc: v1.Descriptor{Size: sb.Size(), Digest: sb.Digest()}, Staged: sb})
	}
	return staged, scans, nil
}

// progressReader reports upload progress every progressStep bytes.
type progressReader struct {
	r           io.Reader
	opts        Options
	name        string
	done, total int64
	last        int64
}

const progressStep = 16 << 20

func (p *progressReader) Read(b []byte) (int, error) {
	n, err := p.r.Read(b)
	p.done += int64(n)
	if p.done-p.last >= progressStep {
		p.last = p.done
		p.opts.emit(Event{Phase: "upload", Name: p.name, Done: p.done, Total: p.total})
	}
	return n, err
}

// ModelManifest returns the manifest bytes and digest that pushing the
// validated model directory d gives.
func ModelManifest(d *modeldir.Dir) ([]byte, v1.Hash, error) {
	config, layers, ann, err := modelBlobs(d, nil)
	if err != nil {
		return nil, v1.Hash{}, err
	}
	raw, err := BuildManifest(ArtifactType(d.Model.Spec.Kind), config, layers, nil, ann)
	if err != nil {
		return nil, v1.Hash{}, err
	}
	h, _, err := v1.SHA256(bytes.NewReader(raw))
	return raw, h, err
}

// ModelBlobs returns the config blob, the layer blobs and the manifest
// annotations of a validated model directory.
func ModelBlobs(d *modeldir.Dir) (Blob, []Blob, map[string]string, error) {
	return modelBlobs(d, nil)
}

// modelBlobs is ModelBlobs; staged, when not nil, holds the tensor files'
// blobs (in d.TensorFiles order) already staged in the store.
func modelBlobs(d *modeldir.Dir, staged []Blob) (Blob, []Blob, map[string]string, error) {
	spec := d.Model.Spec
	parts := map[string][]string{}
	for _, t := range spec.Tensors {
		parts[t.File] = appendUnique(parts[t.File], t.Part)
	}
	var layers []Blob
	for i := range d.TensorFiles {
		f := &d.TensorFiles[i]
		sort.Strings(parts[f.Name])
		ann := map[string]string{AnnotationTitle: f.Name, AnnotationPart: strings.Join(parts[f.Name], ",")}
		if staged != nil {
			b := staged[i]
			b.Desc.MediaType, b.Desc.Annotations = MediaTypeTensors, ann
			layers = append(layers, b)
			continue
		}
		if f.Bytes == nil && f.Size > 0 {
			return Blob{}, nil, nil, fmt.Errorf("tensor file %s was checked by header only; its bytes are not at hand", f.Name)
		}
		layers = append(layers, newBlobSum(MediaTypeTensors, f.Bytes, f.Sha256(), ann))
	}
	layers = append(layers, NewBlob(MediaTypeVocabulary, d.VocabularyFile.Bytes, map[string]string{AnnotationTitle: d.VocabularyFile.Name}))
	if d.StatsFile != nil {
		layers = append(layers, NewBlob(MediaTypeStats, d.StatsFile.Bytes, map[string]string{AnnotationTitle: d.StatsFile.Name}))
	}
	if d.ProbesFile != nil {
		layers = append(layers, NewBlob(MediaTypeProbes, d.ProbesFile.Bytes, map[string]string{AnnotationTitle: d.ProbesFile.Name}))
	}
	config := NewBlob(MediaTypeSpec, d.SpecBytes, nil)
	ann := map[string]string{
		AnnotationKind: spec.Kind,
		AnnotationName: spec.Name,
	}
	if spec.Lineage.Created != "" {
		ann[AnnotationCreated] = spec.Lineage.Created
	}
	if spec.Lineage.SourceRepository != "" {
		ann[AnnotationSource] = spec.Lineage.SourceRepository
	}
	if spec.Lineage.SourceCommit != "" {
		ann[AnnotationRevision] = spec.Lineage.SourceCommit
	}
	if spec.Lineage.TrainingData != "" {
		ann[AnnotationTrainingData] = spec.Lineage.TrainingData
	}
	if spec.Encoder != nil {
		ann[AnnotationEncoder] = spec.Encoder.Digest
	}
	return config, layers, ann, nil
}

func appendUnique(s []string, v string) []string {
	for _, x := range s {
		if x == v {
			return s
		}
	}
	return append(s, v)
}

// PushArtifact uploads config and layers (skipping blobs already present),
// writes the manifest (reusing an identical one already in the
// repository), then tags it — in that order, so the tag never points at
// missing content. ann gets the creation time unless already set. A tag
// the store would refuse (reserved, or with a release log: see
// registry.CheckTagWrite) is refused before anything is written.
func PushArtifact(ctx context.Context, store registry.Store, ref registry.Ref, artifactType string, config Blob, layers []Blob, subject *v1.Descriptor, ann map[string]string, opts Options) (*PushResult, error) {
	if ref.Tag != "" {
		if err := registry.CheckTagWrite(ctx, store, ref.Repository, ref.Tag); err != nil {
			return nil, err
		}
	}
	res := &PushResult{Ref: ref.String(), Kind: strings.TrimSuffix(strings.TrimPrefix(artifactType, "application/vnd.modelgate."), ".v1")}
	var mu sync.Mutex // guards res and serialises progress events
	emit := func(e Event) {
		mu.Lock()
		defer mu.Unlock()
		opts.emit(e)
	}
	nameOf := func(b Blob) string {
		if name := b.Desc.Annotations[AnnotationTitle]; name != "" {
			return name
		}
		if b.Desc.MediaType == MediaTypeSpec {
			return modeldir.SpecFile // a model's config blob
		}
		return string(b.Desc.MediaType)
	}
	// Staged blobs are committed first, in order; a digest listed twice
	// goes up once.
	seen := map[v1.Hash]bool{}
	var todo []Blob
	for _, b := range append([]Blob{config}, layers...) {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		name := nameOf(b)
		switch {
		case b.Staged != nil:
			existed, err := b.Staged.Commit(ctx)
			if err != nil {
				return nil, fmt.Errorf("uploading %s (%s): %w", name, b.Desc.Digest, err)
			}
			if existed || seen[b.Desc.Digest] {
				res.BlobsSkipped++
				emit(Event{Phase: "skip", Name: name, Done: b.Desc.Size, Total: b.Desc.Size})
			} else {
				res.BlobsWritten++
				res.BytesWritten += b.Desc.Size
				emit(Event{Phase: "upload", Name: name, Done: b.Desc.Size, Total: b.Desc.Size})
			}
		case seen[b.Desc.Digest]:
			res.BlobsSkipped++
			emit(Event{Phase: "skip", Name: name, Done: b.Desc.Size, Total: b.Desc.Size})
		default:
			todo = append(todo, b)
		}
		seen[b.Desc.Digest] = true
	}
	// The others go up uploadParallel at a time: a registry or a bucket
	// answers each request after a round trip, and a local store overlaps
	// its fsyncs. The manifest waits for all of them.
	uctx, cancel := context.WithCancel(ctx)
	defer cancel()
	var firstErr error
	sem := make(chan struct{}, uploadParallel)
	var wg sync.WaitGroup
	for _, b := range todo {
		wg.Add(1)
		sem <- struct{}{}
		go func() {
			defer wg.Done()
			defer func() { <-sem }()
			name := nameOf(b)
			written, err := uploadBlob(uctx, store, ref.Repository, b, name, emit)
			mu.Lock()
			defer mu.Unlock()
			switch {
			case err != nil:
				if firstErr == nil {
					firstErr = fmt.Errorf("uploading %s (%s): %w", name, b.Desc.Digest, err)
					cancel()
				}
			case written:
				res.BlobsWritten++
				res.BytesWritten += b.Desc.Size
			default:
				res.BlobsSkipped++
			}
		}()
	}
	wg.Wait()
	if firstErr != nil {
		return nil, firstErr
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	raw, err := BuildManifest(artifactType, config, layers, subject, ann)
	if err != nil {
		return nil, err
	}
	// The same content gives the same bytes (a model's manifest has no
	// push-time clock in it), so a manifest already stored under this
	// digest is reused: one lookup, whatever the repository holds.
	want, _, err := v1.SHA256(bytes.NewReader(raw))
	if err != nil {
		return nil, err
	}
	// Reusing it refreshes it on a store a collection may be removing it
	// from (registry.ReuseManifest), so the collection keeps it.
	if existing, err := registry.ReuseManifest(ctx, store, ref.Repository, want); err == nil {
		res.Manifest = existing
		res.ManifestReused = true
	} else {
		desc, err := store.PutManifest(ctx, ref.Repository, MediaTypeManifest, raw)
		if err != nil {
			return nil, fmt.Errorf("writing manifest: %w", err)
		}
		res.BlobsWritten++
		res.BytesWritten += desc.Size
		res.Manifest = desc
		opts.emit(Event{Phase: "manifest", Name: desc.Digest.String(), Done: desc.Size, Total: desc.Size})
	}
	res.Digest = res.Manifest.Digest.String()
	if ref.Tag != "" {
		if opts.TagCheck != nil {
			if err := opts.TagCheck(ctx, ref, res.Manifest.Digest); err != nil {
				return nil, err
			}
		}
		if err := store.Tag(ctx, ref.Repository, ref.Tag, res.Manifest); err != nil {
			return nil, fmt.Errorf("tagging %s: %w", ref, err)
		}
		opts.emit(Event{Phase: "tag", Name: ref.String()})
	}
	return res, nil
}

// uploadParallel is how many blobs PushArtifact uploads at once.
const uploadParallel = 4

// uploadBlob puts b unless the store has it; written says it was put. A
// blob the store has is reused through registry.ReuseBlob, which keeps a
// collection running meanwhile from removing it.
func uploadBlob(ctx context.Context, store registry.Store, repo string, b Blob, name string, emit func(Event)) (bool, error) {
	if _, err := registry.ReuseBlob(ctx, store, repo, b.Desc.Digest); err == nil {
		emit(Event{Phase: "skip", Name: name, Done: b.Desc.Size, Total: b.Desc.Size})
		return false, nil
	}
	emit(Event{Phase: "upload", Name: name, Done: 0, Total: b.Desc.Size})
	if err := store.PutBlob(ctx, repo, b.Desc.Digest, b.Desc.Size, bytes.NewReader(b.Bytes)); err != nil {
		return false, err
	}
	emit(Event{Phase: "upload", Name: name, Done: b.Desc.Size, Total: b.Desc.Size})
	return true, nil
}

// BuildManifest renders an OCI image manifest v1.1 for an artifact.
func BuildManifest(artifactType string, config Blob, layers []Blob, subject *v1.Descriptor, ann map[string]string) ([]byte, error) {
	layerDescs := make([]v1.Descriptor, len(layers))
	for i, l := range layers {
		layerDescs[i] = l.Desc
	}
	m := v1.Manifest{
		SchemaVersion: 2,
		MediaType:     MediaTypeManifest,
		ArtifactType:  artifactType,
		Config:        config.Desc,
		Layers:        layerDescs,
		Subject:       subject,
		Annotations:   ann,
	}
	raw, err := json.Marshal(m)
	if err != nil {
		return nil, err
	}
	if len(raw) > registry.MaxManifestSize {
		return nil, errkind.New(errkind.BadInput, "manifest would be %d bytes, over the %d-byte limit", len(raw), registry.MaxManifestSize)
	}
	return raw, nil
}

// FindEncoder locates the encoder a scorer references: by digest, first in
// the repository ref.Name names (when it names one), then — only when the
// digest is not there — in the store's other repositories, when the store
// can list them. It fails with BadInput when the digest is not found or
// names something other than an encoder; a store that cannot list its
// repositories (registry.ErrNoCatalog) is a place the encoder was not
// found, not damage.
func FindEncoder(ctx context.Context, store registry.Store, ref *model.EncoderRef) (*Located, error) {
	dg, err := registry.ParseDigest(ref.Digest)
	if err != nil {
		return nil, err
	}
	named := ""
	if ref.Name != "" {
		if r, err := registry.ParseRef(ref.Name, true); err == nil {
			named = r.Repository
		}
	}
	check := func(repo string) (*Located, error) {
		art, err := ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: dg})
		if err != nil {
			return nil, err
		}
		if art.Manifest.ArtifactType != ArtifactType(model.KindEncoder) {
			return nil, errkind.New(errkind.BadInput, "encoder %s (%s) is a %q artifact, not an encoder", ref.Digest, repo, art.Manifest.ArtifactType)
		}
		return &Located{Repository: repo, Digest: dg}, nil
	}
	repo, err := registry.FindManifest(ctx, store, dg, named)
	switch {
	case err == nil:
		return check(repo)
	case errors.Is(err, registry.ErrNoCatalog):
		where := "the store"
		if named != "" {
			where = "repository " + named
		}
		return nil, errkind.New(errkind.BadInput, "the scorer's encoder %s (%s) is not in %s, and %v to search further: push the encoder, or name its repository in the spec's encoder.name", ref.Digest, ref.Name, where, err)
	case errors.Is(err, registry.ErrNotFound):
		return nil, errkind.New(errkind.BadInput, "the scorer's encoder %s (%s) is not in the store: push the encoder first", ref.Digest, ref.Name)
	}
	return nil, err
}

// Located is a manifest found in a repository.
type Located struct {
	Repository string
	Digest     v1.Hash
}
