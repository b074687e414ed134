package freeze

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/version"
)

// Storage formats of a frozen scorer's head tensors.
const (
	StorageF32  = "f32"  // as stored (float32 for every model modelgate makes)
	StorageF16  = "f16"  // IEEE 754 binary16, round to nearest, ties to even
	StorageBF16 = "bf16" // bfloat16: the top half of a binary32, round to nearest, ties to even
)

// Defaults of Options.
const (
	// DefaultMaxError bounds the maximum absolute output change of an
	// f16 or bf16 conversion when Options.MaxError is 0.
	DefaultMaxError = 1e-3
	// DefaultHoldoutRows is the holdout sample size when Options.HoldoutRows is 0.
	DefaultHoldoutRows = 2000
	// SampleSeed seeds the holdout sample (reservoir sampling), so the
	// same holdout always gives the same sample.
	SampleSeed = 0x667265657a65
)

// Annotations a frozen scorer's manifest carries besides the model ones
// (artifact.AnnotationEncoder names the encoder digest, and
// artifact.AnnotationToolVersion the version of the tool that froze it).
const (
	AnnotationFrozenFrom = "dev.modelgate.frozen-from"
	AnnotationStorage    = "dev.modelgate.freeze.storage"
	AnnotationMaxError   = "dev.modelgate.freeze.max-error"
	// AnnotationReportType is set on report artifacts; a freeze record has "freeze".
	AnnotationReportType = "dev.modelgate.report.type"
)

// MediaTypeRecord is the media type of a freeze record's JSON blob.
const MediaTypeRecord = "application/vnd.modelgate.freeze-record.v1+json"

// Options tune Scorer.
type Options struct {
	// Encoder, when set (NAME:TAG or NAME@DIGEST), must resolve to the
	// exact encoder digest the scorer names; the encoder is then read from
	// that repository.
	Encoder string
	// Out is where the frozen scorer is pushed (NAME:TAG). The freeze
	// record goes to the same repository, untagged, as a referrer.
	Out registry.Ref
	// Storage of the head tensors: "" or StorageF32 keep them as stored;
	// StorageF16 and StorageBF16 convert them. The encoder blob is never
	// converted (see the package documentation).
	Storage string
	// MaxError bounds the maximum absolute output change a conversion may
	// cause on the verification rows (DefaultMaxError when 0). Float32
	// storage must be bit-identical instead.
	MaxError float64
	// Holdout, when set, is a holdout file (.parquet, .jsonl) or a holdout
	// artifact reference sampled for the verification besides the probes.
	Holdout string
	// HoldoutRows is the sample size (DefaultHoldoutRows when 0).
	HoldoutRows int
	// Progress receives push events; nil means none.
	Progress func(artifact.Event)
	// Now gives the freeze record's creation time (time.Now when nil).
	Now func() time.Time
	// TagCheck is artifact.Options.TagCheck for the frozen scorer's tag.
	TagCheck func(ctx context.Context, ref registry.Ref, manifest v1.Hash) error
}

// Subject names an artifact.
type Subject struct {
	Ref    string `json:"ref"`
	Digest string `json:"digest"`
	Name   string `json:"name,omitempty"` // the spec's name
}

// Stripped is one piece of training-only state (or of the scorer's own
// copy of its encoder) that the frozen scorer does not carry.
type Stripped struct {
	// Kind: trainable, optimizer-slot, regularization, dropout,
	// training-tensor, embedded-copy, file, layer.
	Kind   string `json:"kind"`
	Name   string `json:"name"`
	Detail string `json:"detail"`
}

// Renamed is a scorer name changed because it clashed with the encoder's.
type Renamed struct {
	Kind string `json:"kind"` // layer, tensor, file
	From string `json:"from"`
	To   string `json:"to"`
}

// SharedBlob is an encoder blob the frozen scorer carries as it is.
type SharedBlob struct {
	File    string   `json:"file"`
	Digest  string   `json:"digest"`
	Size    int64    `json:"size"`
	Tensors []string `json:"tensors"`
}

// HeadFile is one of the frozen scorer's own tensor files.
type HeadFile struct {
	File   string `json:"file"`
	Source string `json:"source"` // its name in the source scorer
	Digest string `json:"digest"`
	Size   int64  `json:"size"`
	// Identical is true when the bytes are the source's, unchanged.
	Identical bool     `json:"identical"`
	Why       string   `json:"why,omitempty"` // why it was re-encoded
	Tensors   []string `json:"tensors"`
}

// CopyComparison compares the scorer's own embedded copy of its encoder
// with the named encoder's tensors.
type CopyComparison struct {
	Differed bool         `json:"differed"`
	MaxAbs   float64      `json:"maxAbs"`
	Tensors  []TensorDiff `json:"tensors"`
}

// TensorDiff compares one tensor of the scorer's copy with the encoder's.
type TensorDiff struct {
	Layer         string  `json:"layer"`
	Role          string  `json:"role"` // weight, bias, tiedTo
	Tensor        string  `json:"tensor"`
	EncoderTensor string  `json:"encoderTensor"`
	Values        int     `json:"values"`
	Differing     int     `json:"differing"`
	MaxAbs        float64 `json:"maxAbs"`
	ShapeDiffers  bool    `json:"shapeDiffers,omitempty"`
}

// Tool names the program that wrote a record.
type Tool struct {
	Name    string `json:"name"`
	Version string `json:"version"`
}

// Record is the freeze record: what freezing did and its verification.
// It is stored as a report artifact whose subject is the frozen scorer.
type Record struct {
	SchemaVersion int     `json:"schemaVersion"`
	Type          string  `json:"type"` // "freeze"
	Tool          Tool    `json:"tool"`
	Created       string  `json:"created"`
	Frozen        Subject `json:"frozen"`
	Source        Subject `json:"source"`
	Encoder       Subject `json:"encoder"`
	Storage       string  `json:"storage"`
	// MaxError is the bound a conversion was held to (f16/bf16 only).
	MaxError     float64         `json:"maxError,omitempty"`
	EncoderBlobs []SharedBlob    `json:"encoderBlobs"`
	HeadFiles    []HeadFile      `json:"headFiles"`
	Stripped     []Stripped      `json:"stripped"`
	Renamed      []Renamed       `json:"renamed"`
	EmbeddedCopy *CopyComparison `json:"embeddedCopy,omitempty"`
	// AgainstSource compares the frozen scorer with the source scorer as
	// stored, run by the runtime (with its own embedded copy, or with the
	// encoder it references), on the same rows.
	AgainstSource *Delta        `json:"againstSource,omitempty"`
	Verification  *Verification `json:"verification"`
	Notes         []string      `json:"notes,omitempty"`
}

// Delta summarises how far one model's outputs are from another's.
type Delta struct {
	Outputs    int     `json:"outputs"`
	Mismatches int     `json:"mismatches"` // outputs whose float32 bits differ
	MaxAbs     float64 `json:"maxAbs"`
	MaxRel     float64 `json:"maxRel"`
}

// Result is what Scorer did.
type Result struct {
	Source  Subject  `json:"source"`
	Encoder Subject  `json:"encoder"`
	Frozen  *Subject `json:"frozen,omitempty"`
	// AlreadyFrozen is true when the source was frozen already; nothing
	// was written and Message says so.
	AlreadyFrozen bool                 `json:"alreadyFrozen"`
	Message       string               `json:"message"`
	Push          *artifact.PushResult `json:"push,omitempty"`
	Record        *Record              `json:"record,omitempty"`
	// RecordDigest is the freeze record artifact's manifest digest, and
	// RecordRef names it (repository@digest).
	RecordDigest string `json:"recordDigest,omitempty"`
	RecordRef    string `json:"recordRef,omitempty"`
}

// Scorer freezes the scorer ref names onto the encoder it uses and pushes
// the result to opts.Out, then the freeze record (a report artifact whose
// subject is the frozen scorer) to the same repository.
//
// Nothing is written unless the frozen scorer verifies: its outputs on
// the probe rows and the holdout sample equal the unfrozen composition bit
// for bit (float32), or lie within opts.MaxError (f16/bf16; a larger
// change is refused as errkind.BadInput, naming the numbers).
//
// Scorer refuses with errkind.BadInput: a source that is not a scorer or
// names no encoder; an opts.Encoder that is not the digest the scorer
// names (both digests in the message) or not an encoder; an encoder that
// is not an encoder; a scorer and encoder whose sparse inputs or shapes
// disagree (the encoder's code width against what the scorer consumes).
// A scorer already frozen is a no-op: Result.AlreadyFrozen, no error.
// Damaged content in the store is errkind.Integrity.
func Scorer(ctx context.Context, store registry.Store, ref registry.Ref, opts Options) (*Result, error) {
	if opts.Out.Tag == "" || opts.Out.HasDigest() {
		return nil, badInput("freeze needs --out NAME:TAG, got %q", opts.Out.String())
	}
	if err := registry.CheckTagWrite(ctx, store, opts.Out.Repository, opts.Out.Tag); err != nil {
		return nil, err
	}
	storage, err := normStorage(opts.Storage)
	if err != nil {
		return nil, err
	}
	maxErr := opts.MaxError
	if maxErr == 0 {
		maxErr = DefaultMaxError
	}
	if maxErr < 0 || maxErr != maxErr {
		return nil, badInput("--max-error %v: want a positive number", opts.MaxError)
	}
	src, err := artifact.Load(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	res := &Result{Source: Subject{Ref: ref.String(), Digest: src.Artifact.Desc.Digest.String()}}
	if k := src.Artifact.Kind(); k != model.KindScorer {
		return nil, badInput("%s is a %q artifact, not a scorer: only scorers are frozen", ref, src.Artifact.Manifest.ArtifactType)
	}
	if src.Spec == nil {
		// A scorer spec without an encoder breaks the schema; say so plainly.
		var lax model.Spec
		if raw, err := artifact.ReadBlob(ctx, store, src.Artifact.Repository, src.Artifact.Manifest.Config, modeldir.MaxSpecSize); err == nil &&
			json.Unmarshal(raw, &lax) == nil && lax.Kind == model.KindScorer && lax.Encoder == nil {
			return nil, badInput("scorer %s names no encoder: there is nothing to freeze", ref)
		}
		return nil, badInput("%s: the stored spec is not valid:\n  %s", ref, strings.Join(src.Problems, "\n  "))
	}
	s := src.Spec
	res.Source.Name = s.Name
	if s.Encoder == nil || s.Encoder.Digest == "" {
		return nil, badInput("scorer %s names no encoder: there is nothing to freeze", ref)
	}
	res.Encoder = Subject{Ref: s.Encoder.Name, Digest: s.Encoder.Digest}
	if s.Encoder.Embedded && s.Lineage.FrozenFrom != "" {
		res.AlreadyFrozen = true
		res.Frozen = &res.Source
		res.Message = fmt.Sprintf("%s is already frozen (from %s, encoder %s embedded): nothing to do", ref, s.Lineage.FrozenFrom, s.Encoder.Digest)
		if want := storageOf(src.Artifact); storage != StorageF32 && storage != want {
			res.Message += fmt.Sprintf("; to store it as %s, freeze its source %s again with that storage", storage, s.Lineage.FrozenFrom)
		}
		return res, nil
	}

	encLoc, err := locateEncoder(ctx, store, s.Encoder, opts.Encoder)
	if err != nil {
		return nil, err
	}
	enc, err := artifact.Load(ctx, store, registry.Ref{Repository: encLoc.Repository, Digest: encLoc.Digest})
	if err != nil {
		return nil, fmt.Errorf("loading encoder %s: %w", s.Encoder.Digest, err)
	}
	if enc.Spec == nil || len(enc.Problems) > 0 {
		return nil, errkind.New(errkind.Integrity, "encoder %s@%s is damaged:\n  %s", encLoc.Repository, encLoc.Digest, strings.Join(enc.Problems, "\n  "))
	}
	if enc.Spec.Kind != model.KindEncoder {
		return nil, badInput("%s@%s has a spec of kind %q, not an encoder", encLoc.Repository, encLoc.Digest, enc.Spec.Kind)
	}
	if res.Encoder.Ref == "" {
		res.Encoder.Ref = encLoc.Repository + "@" + encLoc.Digest.String()
	}
	res.Encoder.Name = enc.Spec.Name
	var own []string
	for _, p := range src.Problems {
		if !strings.HasPrefix(p, "encoder: ") {
			own = append(own, p)
		}
	}
	if len(own) > 0 {
		return nil, errkind.New(errkind.Integrity, "scorer %s@%s is damaged:\n  %s", ref, src.Artifact.Desc.Digest, strings.Join(own, "\n  "))
	}

	srcStored := storedOf(ctx, store, src, ref.String())
	encStored := storedOf(ctx, store, enc, res.Encoder.Ref)
	p, err := buildPlan(srcStored, encStored, storage)
	if err != nil {
		return nil, err
	}
	if d := vocabularyDiff(src.Vocab, enc.Vocab); d != "" {
		p.notes = append(p.notes, d)
	}
	if storage != StorageF32 {
		p.notes = append(p.notes, fmt.Sprintf("head tensors stored as %s; the encoder blob stays as the encoder version stores it, shared by digest (a %s encoder would be a different encoder version)", storage, storage))
	}

	// Verify the frozen scorer before anything is written.
	frozenNet, err := model.Compile(p.spec, p.tensors, nil)
	if err != nil {
		return nil, fmt.Errorf("the frozen scorer does not compile (a bug in freeze): %w", err)
	}
	sets, err := collectRows(p.spec, src.Vocab, p.probeRows, opts.holdout(ctx, store))
	if err != nil {
		return nil, err
	}
	defer sets.close()
	ver, err := verifyNets(frozenNet, p.spec, src.Spec, src.Tensors, enc, sets.sets)
	if err != nil {
		return nil, err
	}
	ver.Encoder = s.Encoder.Digest
	ver.Source = res.Source.Digest
	ver.Reference = "source scorer " + res.Source.Digest + " head, encoder " + s.Encoder.Digest + " run on its own"
	ver.setBound(storage, maxErr)
	if !ver.Passed {
		if storage == StorageF32 {
			return nil, fmt.Errorf("the frozen scorer is not bit-identical to the composition of %s and the source's head (a bug in freeze or the runtime): %s", s.Encoder.Digest, ver.summary())
		}
		return nil, badInput("storing the head as %s changes outputs by up to %.3g (relative %.3g) on %d rows, above --max-error %.3g: refused, nothing written",
			storage, ver.MaxAbs, ver.MaxRel, ver.rows(), maxErr)
	}
	against, err := againstSource(frozenNet, src, enc, sets.sets)
	if err != nil {
		return nil, err
	}

	// Push: blobs, manifest, tag; then the record.
	d := &modeldir.Dir{Model: &modeldir.Model{Spec: p.spec}, SpecBytes: p.specBytes, TensorFiles: p.tensorFiles,
		VocabularyFile: p.vocab, StatsFile: p.stats, ProbesFile: p.probes}
	config, layers, ann, err := artifact.ModelBlobs(d)
	if err != nil {
		return nil, err
	}
	ann[AnnotationFrozenFrom] = res.Source.Digest
	ann[artifact.AnnotationToolVersion] = version.Version
	ann[AnnotationStorage] = storage
	if storage != StorageF32 {
		ann[AnnotationMaxError] = strconv.FormatFloat(maxErr, 'g', -1, 64)
	}
	push, err := artifact.PushArtifact(ctx, store, opts.Out, artifact.ArtifactType(model.KindScorer), config, layers, nil, ann,
		artifact.Options{Progress: opts.Progress, TagCheck: opts.TagCheck})
	if err != nil {
		return nil, fmt.Errorf("pushing the frozen scorer: %w", err)
	}
	res.Push = push
	res.Frozen = &Subject{Ref: opts.Out.String(), Digest: push.Digest, Name: p.spec.Name}
	ver.Scorer = push.Digest
	now := time.Now
	if opts.Now != nil {
		now = opts.Now
	}
	rec := &Record{
		SchemaVersion: 1, Type: "freeze", Tool: Tool{Name: "modelgate", Version: version.Version},
		Created: now().UTC().Format(time.RFC3339),
		Frozen:  *res.Frozen, Source: res.Source, Encoder: res.Encoder, Storage: storage,
		EncoderBlobs: p.shared, HeadFiles: p.head, Stripped: nonNil(p.stripped), Renamed: nonNil(p.renamed),
		EmbeddedCopy: p.copyCmp, AgainstSource: against, Verification: ver, Notes: p.notes,
	}
	if storage != StorageF32 {
		rec.MaxError = maxErr
	}
	res.Record = rec
	rd, err := pushRecord(ctx, store, opts.Out.Repository, push.Manifest, rec, opts.Progress)
	if err != nil {
		return nil, fmt.Errorf("pushing the freeze record (the frozen scorer %s is stored): %w", push.Digest, err)
	}
	res.RecordDigest, res.RecordRef = rd, opts.Out.Repository+"@"+rd
	res.Message = fmt.Sprintf("froze %s onto encoder %s as %s (%s)", ref, s.Encoder.Digest, opts.Out, push.Digest)
	return res, nil
}

func nonNil[T any](s []T) []T {
	if s == nil {
		return []T{}
	}
	return s
}

func normStorage(s string) (string, error) {
	switch strings.ToLower(s) {
	case "", StorageF32:
		return StorageF32, nil
	case StorageF16:
		return StorageF16, nil
	case StorageBF16:
		return StorageBF16, nil
	}
	return "", badInput("--storage %q: use f32, f16 or bf16", s)
}

// storageOf reads a frozen scorer's storage annotation (f32 when absent).
func storageOf(a *artifact.Artifact) string {
	if s := a.Manifest.Annotations[AnnotationStorage]; s != "" {
		return s
	}
	return StorageF32
}

// locateEncoder finds the encoder a scorer names; when given, encRef must
// resolve to exactly that digest.
func locateEncoder(ctx context.Context, store registry.Store, named *model.EncoderRef, encRef string) (*artifact.Located, error) {
	if encRef == "" {
		return artifact.FindEncoder(ctx, store, named)
	}
	r, err := registry.ParseRef(encRef, false)
	if err != nil {
		return nil, err
	}
	a, err := artifact.ReadArtifact(ctx, store, r)
	if err != nil {
		if errors.Is(err, registry.ErrNotFound) {
			return nil, errkind.New(errkind.BadInput, "--encoder %s: %w", encRef, err)
		}
		return nil, err
	}
	if got := a.Desc.Digest.String(); got != named.Digest {
		return nil, badInput("--encoder %s is %s, but the scorer names encoder %s: refusing to freeze onto another encoder version", encRef, got, named.Digest)
	}
	if a.Kind() != model.KindEncoder {
		return nil, badInput("--encoder %s (%s) is a %q artifact, not an encoder", encRef, a.Desc.Digest, a.Manifest.ArtifactType)
	}
	return &artifact.Located{Repository: r.Repository, Digest: a.Desc.Digest}, nil
}

// storedOf gives buildPlan a loaded model and its raw files.
func storedOf(ctx context.Context, store registry.Store, l *artifact.Loaded, ref string) *stored {
	layers := map[string]v1.Descriptor{}
	for _, d := range l.Artifact.Manifest.Layers {
		layers[d.Annotations[artifact.AnnotationTitle]] = d
	}
	return &stored{
		Spec: l.Spec, Tensors: l.Tensors, Probes: l.Probes,
		Digest: l.Artifact.Desc.Digest.String(), Ref: ref,
		Raw: func(name string) ([]byte, error) {
			d, ok := layers[name]
			if !ok {
				return nil, errkind.New(errkind.Integrity, "%s has no layer titled %q", ref, name)
			}
			return artifact.ReadBlob(ctx, store, l.Artifact.Repository, d, artifact.MaxBlobSize)
		},
	}
}

// vocabularyDiff notes a scorer vocabulary that differs from its encoder's.
func vocabularyDiff(s, e []string) string {
	n := 0
	for i := range min(len(s), len(e)) {
		if s[i] != e[i] {
			n++
		}
	}
	if n == 0 && len(s) == len(e) {
		return ""
	}
	return fmt.Sprintf("the scorer's vocabulary differs from the encoder's in %d of %d rows: the frozen scorer keeps the scorer's (rows map through it, as the runtime does for the unfrozen scorer); the gate's contract check judges whether it matches the weights", n, len(s))
}

func digestOf(b []byte) string {
	s := sha256.Sum256(b)
	return "sha256:" + hex.EncodeToString(s[:])
}
