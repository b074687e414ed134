package artifact

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"sort"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// LayerRow is one row of a model's layer table.
type LayerRow struct {
	Name       string `json:"name"`
	Op         string `json:"op"`
	Inputs     string `json:"inputs"`
	Weight     string `json:"weight,omitempty"`
	Shape      []int  `json:"shape,omitempty"`
	Activation string `json:"activation,omitempty"`
	Width      int    `json:"width"`
	Params     int64  `json:"params"`
}

// Description is what `show` prints about an artifact: everything below
// for a model; for other artifacts (holdouts, reports, approvals, release
// records) the kind, blobs, tags, subject and annotations, plus a
// holdout's summary.
type Description struct {
	Ref          string               `json:"ref"`
	Digest       string               `json:"digest"`
	Kind         string               `json:"kind"`
	ArtifactType string               `json:"artifactType"`
	Name         string               `json:"name"`
	Description  string               `json:"description,omitempty"`
	Inputs       model.Inputs         `json:"inputs"`
	Layers       []LayerRow           `json:"layers"`
	Tensors      []model.Tensor       `json:"tensors"`
	Params       int64                `json:"params"`
	Encoder      *model.EncoderRef    `json:"encoder,omitempty"`
	Training     *model.TrainingState `json:"training,omitempty"`
	Lineage      model.Lineage        `json:"lineage"`
	Blobs        []BlobRow            `json:"blobs"`
	TotalSize    int64                `json:"totalSize"`
	Annotations  map[string]string    `json:"annotations"`
	Tags         []string             `json:"tags"`
	Probes       int                  `json:"probes"`
	Problems     []string             `json:"problems,omitempty"`
	// EncoderMissing is why a scorer's encoder is not in the store, when
	// it is not (also one of Problems).
	EncoderMissing error `json:"-"`
	// Subject is the digest of the artifact this one is about (reports,
	// approvals and records name the model or record they concern).
	Subject string `json:"subject,omitempty"`
	// Holdout is a holdout's summary (its config blob, verified).
	Holdout *HoldoutInfo `json:"holdout,omitempty"`
	// Referrers are the artifacts about this one in its repository (gate
	// reports, approvals, release and freeze records), oldest first, as
	// their manifests' annotations describe them (not verified here:
	// promote and log verify signatures).
	Referrers []ReferrerRow `json:"referrers"`
}

// ReferrerRow is one artifact whose subject is the described one.
type ReferrerRow struct {
	Digest  string `json:"digest"`
	Kind    string `json:"kind"`
	Created string `json:"created,omitempty"`
	// Target is the tag a report, approval or record is for.
	Target string `json:"target,omitempty"`
	// Verdict is a gate report's verdict; Shard marks a shard's partial
	// results.
	Verdict string `json:"verdict,omitempty"`
	Shard   string `json:"shard,omitempty"`
	// Signer is the key id that signed it, when it is signed.
	Signer string `json:"signer,omitempty"`
	// Action is a release record's kind (promote, rollback, …).
	Action string `json:"action,omitempty"`
}

// The annotations the packages that write referrers set (internal/checks,
// internal/release, internal/freeze); read here by name only, to describe.
const (
	annTarget  = "dev.modelgate.target"
	annVerdict = "dev.modelgate.verdict"
	annShard   = "dev.modelgate.shard"
	annSigner  = "dev.modelgate.signer.keyid"
	annRelKind = "dev.modelgate.release.kind"
)

// referrersOf lists the artifacts about digest in repo, oldest first.
func referrersOf(ctx context.Context, store registry.Store, repo string, digest v1.Hash) ([]ReferrerRow, error) {
	ds, err := store.Referrers(ctx, repo, digest, "")
	if err != nil {
		if errors.Is(err, registry.ErrNotFound) {
			return []ReferrerRow{}, nil
		}
		return nil, err
	}
	rows := []ReferrerRow{}
	for _, d := range ds {
		a := d.Annotations
		rows = append(rows, ReferrerRow{Digest: d.Digest.String(), Kind: KindOf(d.ArtifactType), Created: a[AnnotationCreated],
			Target: a[annTarget], Verdict: a[annVerdict], Shard: a[annShard], Signer: a[annSigner], Action: a[annRelKind]})
	}
	sort.SliceStable(rows, func(i, j int) bool {
		if rows[i].Created != rows[j].Created {
			return rows[i].Created < rows[j].Created
		}
		return rows[i].Digest < rows[j].Digest
	})
	return rows, nil
}

// BlobRow is one blob of an artifact.
type BlobRow struct {
	Title     string `json:"title"`
	MediaType string `json:"mediaType"`
	Digest    string `json:"digest"`
	Size      int64  `json:"size"`
}

// Describe loads a model and summarises it, including the tags of its
// repository that point at it.
func Describe(ctx context.Context, store registry.Store, ref registry.Ref) (*Description, error) {
	a, err := ReadArtifact(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	if k := a.Kind(); k != model.KindEncoder && k != model.KindScorer {
		return describeOther(ctx, store, ref, a)
	}
	// Checked as a stream, as verify does: memory does not grow with the
	// model.
	l, err := checkModel(ctx, store, a, true)
	if err != nil {
		return nil, err
	}
	d := &Description{
		Ref: ref.String(), Digest: a.Desc.Digest.String(), Kind: a.Kind(), ArtifactType: a.Manifest.ArtifactType,
		Annotations: a.Manifest.Annotations, Problems: l.Problems, Probes: len(l.Probes), EncoderMissing: l.EncoderMissing,
	}
	d.Blobs = append(d.Blobs, BlobRow{Title: "(config) spec.json", MediaType: string(a.Manifest.Config.MediaType), Digest: a.Manifest.Config.Digest.String(), Size: a.Manifest.Config.Size})
	d.TotalSize = a.Desc.Size + a.Manifest.Config.Size
	for _, b := range a.Manifest.Layers {
		d.Blobs = append(d.Blobs, BlobRow{Title: b.Annotations[AnnotationTitle], MediaType: string(b.MediaType), Digest: b.Digest.String(), Size: b.Size})
		d.TotalSize += b.Size
	}
	d.Tags = tagsOf(ctx, store, ref.Repository, a.Desc.Digest)
	if d.Referrers, err = referrersOf(ctx, store, ref.Repository, a.Desc.Digest); err != nil {
		return nil, err
	}
	if l.Spec == nil {
		return d, nil
	}
	s := l.Spec
	d.Name, d.Description, d.Inputs, d.Tensors = s.Name, s.Description, s.Inputs, s.Tensors
	d.Encoder, d.Training, d.Lineage = s.Encoder, s.Training, s.Lineage
	var encSpec *model.Spec
	if l.Encoder != nil {
		encSpec = l.Encoder.Spec
	}
	d.Layers = LayerTable(s, encSpec)
	for _, t := range s.Tensors {
		d.Params += numel(t.Shape)
	}
	return d, nil
}

func numel(shape []int) int64 {
	n := int64(1)
	for _, x := range shape {
		n *= int64(x)
	}
	return n
}

// LayerTable lists a spec's layers with their output widths and parameter
// counts; enc (may be nil) resolves "encoder/…" inputs of a scorer.
func LayerTable(s *model.Spec, enc *model.Spec) []LayerRow {
	shapes := map[string][]int{}
	for _, t := range s.Tensors {
		shapes[t.Name] = t.Shape
	}
	width := map[string]int{}
	if enc != nil {
		for _, r := range LayerTable(enc, nil) {
			width[model.EncoderPrefix+r.Name] = r.Width
		}
	}
	for _, in := range s.Inputs.Sparse {
		width[in.Name] = in.Rows()
	}
	for _, in := range s.Inputs.Dense {
		width[in.Name] = in.Size
	}
	var rows []LayerRow
	for _, l := range s.Layers {
		r := LayerRow{Name: l.Name, Op: l.Op, Activation: l.Activation}
		ins := l.Inputs
		if l.Input != "" {
			ins = []string{l.Input}
		}
		r.Inputs = strings.Join(ins, ", ")
		switch l.Op {
		case model.OpSparseDense, model.OpDense:
			r.Weight, r.Shape = l.Weight, shapes[l.Weight]
			if len(r.Shape) == 2 {
				r.Width = r.Shape[1]
			}
			r.Params = numel(r.Shape)
		case model.OpTiedDecoder:
			r.Weight, r.Shape = l.TiedTo+"ᵀ", shapes[l.TiedTo]
			if len(r.Shape) == 2 {
				r.Width = r.Shape[0]
			}
		case model.OpConcat:
			for _, in := range ins {
				r.Width += width[in]
			}
		}
		if l.Bias != "" {
			r.Params += numel(shapes[l.Bias])
		}
		width[l.Name] = r.Width
		rows = append(rows, r)
	}
	return rows
}

// TensorChange is how one tensor differs between two models.
type TensorChange struct {
	Name    string  `json:"name"`
	Change  string  `json:"change"` // added, removed, shape, dtype, values, same
	ShapeA  []int   `json:"shapeA,omitempty"`
	ShapeB  []int   `json:"shapeB,omitempty"`
	Changed int64   `json:"changedValues"`
	MaxAbs  float64 `json:"maxAbsChange"`
	MaxRel  float64 `json:"maxRelChange"`
}

// SpecChange is one differing JSON value of two specs.
type SpecChange struct {
	Pointer string          `json:"pointer"`
	A       json.RawMessage `json:"a,omitempty"`
	B       json.RawMessage `json:"b,omitempty"`
}

// Difference is what `diff` prints.
type Difference struct {
	A, B       string         `json:"-"`
	DigestA    string         `json:"digestA"`
	DigestB    string         `json:"digestB"`
	Identical  bool           `json:"identical"`
	Spec       []SpecChange   `json:"spec"`
	Tensors    []TensorChange `json:"tensors"`
	Vocabulary VocabChange    `json:"vocabulary"`
	// Files lists every file of the two models (spec.json and each layer,
	// by its file name) and whether its bytes differ.
	Files []FileChange `json:"files"`
	// Stats lists the differing values of the training statistics
	// (stats.json) by JSON pointer.
	Stats []SpecChange `json:"stats"`
	// Probes compares the probe rows.
	Probes      ProbeChange `json:"probes"`
	SizeA       int64       `json:"sizeA"`
	SizeB       int64       `json:"sizeB"`
	SharedBlobs int         `json:"sharedBlobs"`
}

// FileChange is how one file of a model differs: "same", "changed",
// "added" (only in B) or "removed" (only in A).
type FileChange struct {
	Name    string `json:"name"`
	Change  string `json:"change"`
	DigestA string `json:"digestA,omitempty"`
	DigestB string `json:"digestB,omitempty"`
	SizeA   int64  `json:"sizeA,omitempty"`
	SizeB   int64  `json:"sizeB,omitempty"`
}

// ProbeChange compares the probe rows of two models.
type ProbeChange struct {
	CountA int `json:"countA"`
	CountB int `json:"countB"`
	// Changed: the probe files' bytes differ.
	Changed bool `json:"changed"`
}

// VocabChange compares two vocabularies row by row.
type VocabChange struct {
	LenA int `json:"lenA"`
	LenB int `json:"lenB"`
	// Moved counts rows whose id differs between A and B at the same row.
	RowsDiffer int `json:"rowsDiffer"`
}

// Diff compares two models: spec values by JSON pointer, tensors value by
// value, vocabularies row by row, and blob sizes.
func Diff(ctx context.Context, store registry.Store, ra, rb registry.Ref) (*Difference, error) {
	la, err := Load(ctx, store, ra)
	if err != nil {
		return nil, err
	}
	lb, err := Load(ctx, store, rb)
	if err != nil {
		return nil, err
	}
	d := &Difference{A: ra.String(), B: rb.String(), DigestA: la.Artifact.Desc.Digest.String(), DigestB: lb.Artifact.Desc.Digest.String()}
	d.Identical = d.DigestA == d.DigestB
	blobsA := map[string]bool{}
	for _, b := range append(la.Artifact.Manifest.Layers, la.Artifact.Manifest.Config) {
		d.SizeA += b.Size
		blobsA[b.Digest.String()] = true
	}
	for _, b := range append(lb.Artifact.Manifest.Layers, lb.Artifact.Manifest.Config) {
		d.SizeB += b.Size
		if blobsA[b.Digest.String()] {
			d.SharedBlobs++
		}
	}
	if la.Spec != nil && lb.Spec != nil {
		d.Spec = diffJSON(la.Spec, lb.Spec)
	}
	d.Tensors = diffTensors(la, lb)
	d.Files = diffFiles(la.Artifact, lb.Artifact)
	sa, sb := la.Stats, lb.Stats
	if sa == nil {
		sa = map[string]any{}
	}
	if sb == nil {
		sb = map[string]any{}
	}
	d.Stats = diffJSON(sa, sb)
	d.Probes = ProbeChange{CountA: len(la.Probes), CountB: len(lb.Probes)}
	if la.Spec != nil && lb.Spec != nil {
		for _, f := range d.Files {
			if f.Name == la.Spec.Files.Probes && f.Change != "same" {
				d.Probes.Changed = true
			}
		}
	}
	d.Vocabulary = VocabChange{LenA: len(la.Vocab), LenB: len(lb.Vocab)}
	for i := 0; i < len(la.Vocab) && i < len(lb.Vocab); i++ {
		if la.Vocab[i] != lb.Vocab[i] {
			d.Vocabulary.RowsDiffer++
		}
	}
	return d, nil
}

// diffFiles compares the files of two model artifacts by digest: the
// config (spec.json) and every layer, named by its file title.
func diffFiles(a, b *Artifact) []FileChange {
	files := func(x *Artifact) map[string]v1.Descriptor {
		m := map[string]v1.Descriptor{modeldir.SpecFile: x.Manifest.Config}
		for _, l := range x.Manifest.Layers {
			m[l.Annotations[AnnotationTitle]] = l
		}
		return m
	}
	fa, fb := files(a), files(b)
	names := map[string]bool{}
	for n := range fa {
		names[n] = true
	}
	for n := range fb {
		names[n] = true
	}
	sorted := make([]string, 0, len(names))
	for n := range names {
		sorted = append(sorted, n)
	}
	sort.Strings(sorted)
	var out []FileChange
	for _, n := range sorted {
		da, inA := fa[n]
		db, inB := fb[n]
		c := FileChange{Name: n, Change: "same"}
		if inA {
			c.DigestA, c.SizeA = da.Digest.String(), da.Size
		}
		if inB {
			c.DigestB, c.SizeB = db.Digest.String(), db.Size
		}
		switch {
		case !inA:
			c.Change = "added"
		case !inB:
			c.Change = "removed"
		case da.Digest != db.Digest:
			c.Change = "changed"
		}
		out = append(out, c)
	}
	return out
}

func diffTensors(la, lb *Loaded) []TensorChange {
	specT := func(l *Loaded) map[string]model.Tensor {
		m := map[string]model.Tensor{}
		if l.Spec != nil {
			for _, t := range l.Spec.Tensors {
				m[t.Name] = t
			}
		}
		return m
	}
	ta, tb := specT(la), specT(lb)
	names := map[string]bool{}
	for n := range ta {
		names[n] = true
	}
	for n := range tb {
		names[n] = true
	}
	sorted := make([]string, 0, len(names))
	for n := range names {
		sorted = append(sorted, n)
	}
	sort.Strings(sorted)
	var out []TensorChange
	for _, n := range sorted {
		a, inA := ta[n]
		b, inB := tb[n]
		c := TensorChange{Name: n, ShapeA: a.Shape, ShapeB: b.Shape}
		switch {
		case !inA:
			c.Change = "added"
		case !inB:
			c.Change = "removed"
		case fmt.Sprint(a.Shape) != fmt.Sprint(b.Shape):
			c.Change = "shape"
		default:
			va, vb := la.Tensors[n], lb.Tensors[n]
			if len(va) != len(vb) {
				c.Change = "unreadable"
				break
			}
			for i := range va {
				if va[i] == vb[i] {
					continue
				}
				c.Changed++
				abs := math.Abs(float64(va[i]) - float64(vb[i]))
				c.MaxAbs = math.Max(c.MaxAbs, abs)
				if den := math.Abs(float64(va[i])); den > 0 {
					c.MaxRel = math.Max(c.MaxRel, abs/den)
				} else {
					c.MaxRel = math.Inf(1)
				}
			}
			switch {
			case c.Changed > 0:
				c.Change = "values"
			case a.DType != b.DType:
				c.Change = "dtype"
			default:
				c.Change = "same"
			}
		}
		out = append(out, c)
	}
	return out
}

// diffJSON compares two values through their JSON forms, leaf by leaf.
func diffJSON(a, b any) []SpecChange {
	fa, fb := map[string]json.RawMessage{}, map[string]json.RawMessage{}
	flatten(toAny(a), "", fa)
	flatten(toAny(b), "", fb)
	keys := map[string]bool{}
	for k := range fa {
		keys[k] = true
	}
	for k := range fb {
		keys[k] = true
	}
	sorted := make([]string, 0, len(keys))
	for k := range keys {
		sorted = append(sorted, k)
	}
	sort.Strings(sorted)
	var out []SpecChange
	for _, k := range sorted {
		if string(fa[k]) != string(fb[k]) {
			out = append(out, SpecChange{Pointer: k, A: fa[k], B: fb[k]})
		}
	}
	return out
}

func toAny(v any) any {
	b, _ := json.Marshal(v)
	var out any
	_ = json.Unmarshal(b, &out)
	return out
}

func flatten(v any, ptr string, out map[string]json.RawMessage) {
	switch x := v.(type) {
	case map[string]any:
		for k, e := range x {
			flatten(e, ptr+"/"+strings.NewReplacer("~", "~0", "/", "~1").Replace(k), out)
		}
	case []any:
		if isLeafArray(x) {
			b, _ := json.Marshal(x)
			out[ptr] = b
			return
		}
		for i, e := range x {
			flatten(e, fmt.Sprintf("%s/%d", ptr, i), out)
		}
	default:
		b, _ := json.Marshal(x)
		out[ptr] = b
	}
}

func isLeafArray(x []any) bool {
	for _, e := range x {
		switch e.(type) {
		case map[string]any, []any:
			return false
		}
	}
	return true
}

// tagsOf lists the tags of repo pointing at dgst, as REPO:TAG.
func tagsOf(ctx context.Context, store registry.Store, repo string, dgst v1.Hash) []string {
	var out []string
	tags, err := store.Tags(ctx, repo)
	if err != nil {
		return nil
	}
	for _, t := range tags {
		if td, err := store.Resolve(ctx, repo, t); err == nil && td.Digest == dgst {
			out = append(out, repo+":"+t)
		}
	}
	return out
}

// describeOther describes an artifact that is not a model. A holdout's
// summary is read (and verified); its data blob is not re-read here
// (`verify` re-hashes it).
func describeOther(ctx context.Context, store registry.Store, ref registry.Ref, a *Artifact) (*Description, error) {
	m := a.Manifest
	d := &Description{Ref: ref.String(), Digest: a.Desc.Digest.String(), Kind: a.Kind(), ArtifactType: m.ArtifactType,
		Annotations: m.Annotations, TotalSize: a.Desc.Size + m.Config.Size}
	if d.Kind == "" {
		d.Kind = "other"
	}
	if m.Subject != nil {
		d.Subject = m.Subject.Digest.String()
	}
	d.Blobs = append(d.Blobs, BlobRow{Title: "(config)", MediaType: string(m.Config.MediaType), Digest: m.Config.Digest.String(), Size: m.Config.Size})
	for _, b := range m.Layers {
		d.Blobs = append(d.Blobs, BlobRow{Title: b.Annotations[AnnotationTitle], MediaType: string(b.MediaType), Digest: b.Digest.String(), Size: b.Size})
		d.TotalSize += b.Size
	}
	d.Tags = tagsOf(ctx, store, ref.Repository, a.Desc.Digest)
	var err error
	if d.Referrers, err = referrersOf(ctx, store, ref.Repository, a.Desc.Digest); err != nil {
		return nil, err
	}
	if m.Config.MediaType == MediaTypeHoldoutInfo {
		raw, err := ReadBlob(ctx, store, a.Repository, m.Config, MaxHoldoutInfoSize)
		if err != nil {
			return nil, err
		}
		var info HoldoutInfo
		if err := json.Unmarshal(raw, &info); err != nil {
			d.Problems = append(d.Problems, fmt.Sprintf("holdout summary: %v", err))
		} else {
			d.Holdout = &info
		}
	}
	return d, nil
}
