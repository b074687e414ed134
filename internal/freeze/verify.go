package freeze

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/registry"
)

// Verification is the result of comparing a scorer that embeds its
// encoder with the unfrozen composition: the named encoder run on its own
// (from the encoder artifact), then the source scorer's head fed with the
// encoder's outputs.
type Verification struct {
	// Scorer is the verified scorer's manifest digest ("" before it is pushed).
	Scorer  string `json:"scorer"`
	Encoder string `json:"encoder"`
	// Source is the digest of the scorer whose head is the reference
	// (lineage.frozenFrom), or "" when the scorer's own head is used.
	Source string `json:"source,omitempty"`
	// Reference says in words what the outputs were compared with.
	Reference string `json:"reference"`
	Storage   string `json:"storage"`
	// Exact is true when equality is required bit for bit (float32
	// storage); otherwise MaxAbs must not exceed Bound.
	Exact bool        `json:"exact"`
	Bound float64     `json:"bound,omitempty"`
	Sets  []SetResult `json:"sets"`
	// Totals over all sets.
	Outputs    int     `json:"outputs"`
	Mismatches int     `json:"mismatches"` // outputs whose float32 bits differ
	MaxAbs     float64 `json:"maxAbs"`
	MaxRel     float64 `json:"maxRel"`
	Passed     bool    `json:"passed"`
	// Problems say why the test failed or could not run; empty when Passed.
	Problems []string `json:"problems,omitempty"`
	// Notes are remarks that do not fail the test.
	Notes []string `json:"notes,omitempty"`
}

// SetResult is the comparison on one row set.
type SetResult struct {
	Name string `json:"name"` // probes or holdout
	From string `json:"from"`
	// Rows compared, out of Total the source holds (the holdout sample
	// is a subset).
	Rows       int        `json:"rows"`
	Total      int64      `json:"total"`
	Outputs    int        `json:"outputs"`
	Mismatches int        `json:"mismatches"`
	MaxAbs     float64    `json:"maxAbs"`
	MaxRel     float64    `json:"maxRel"`
	Worst      *Deviation `json:"worst,omitempty"`
	Notes      []string   `json:"notes,omitempty"`
}

// Deviation is the largest output difference of a set.
type Deviation struct {
	Row    int64   `json:"row"` // probe line (from 1) or holdout row_id
	Column int     `json:"column"`
	Got    float32 `json:"got"`  // the verified scorer
	Want   float32 `json:"want"` // the composition
	Abs    float64 `json:"abs"`
}

// VerifyOption tunes Verify.
type VerifyOption func(*verifyConfig)

type verifyConfig struct {
	holdout string
	rows    int
}

// WithHoldout adds a seeded sample of rows (DefaultHoldoutRows when rows
// ≤ 0) of a holdout, a file or a holdout artifact reference, to the probe
// rows Verify compares on.
func WithHoldout(holdout string, rows int) VerifyOption {
	return func(c *verifyConfig) { c.holdout, c.rows = holdout, rows }
}

// Verify re-runs the freeze equality test on l, a loaded scorer whose
// encoder is embedded (frozen by Scorer, or embedded by its exporter): its
// output is compared with the named encoder, run on its own from the
// encoder artifact, composed with the head of the scorer it was frozen
// from (lineage.frozenFrom, looked up by digest in the store; without it,
// l's own head). The rows are l's probe rows and, with WithHoldout, a
// holdout sample. Float32 storage must agree bit for bit; f16/bf16
// storage (annotation dev.modelgate.freeze.storage) within the bound the
// artifact records (dev.modelgate.freeze.max-error, else DefaultMaxError).
// Verify also requires every encoder-side layer (one named like a layer
// of the encoder) to be the encoder's layer, with bit-identical tensors.
//
// A test that runs and fails returns a Verification with Passed false and
// the Problems; so does a named encoder that is not in the store or not an
// encoder. Verify returns an error — of kind errkind.BadInput — for a
// model that is not a scorer with an embedded encoder, and store errors as
// they come.
func Verify(ctx context.Context, store registry.Store, l *artifact.Loaded, opts ...VerifyOption) (*Verification, error) {
	cfg := verifyConfig{}
	for _, o := range opts {
		o(&cfg)
	}
	if l == nil || l.Spec == nil {
		return nil, badInput("verify freeze: the model has no valid spec")
	}
	s := l.Spec
	ref := l.Artifact.Repository + "@" + l.Artifact.Desc.Digest.String()
	switch {
	case s.Kind != model.KindScorer:
		return nil, badInput("verify freeze: %s is a %s, not a scorer", ref, s.Kind)
	case s.Encoder == nil:
		return nil, badInput("verify freeze: scorer %s names no encoder", ref)
	case !s.Encoder.Embedded:
		return nil, badInput("verify freeze: scorer %s references encoder %s by digest: nothing is embedded to verify (freeze it first)", ref, s.Encoder.Digest)
	}
	storage := storageOf(l.Artifact)
	bound := DefaultMaxError
	if b, err := strconv.ParseFloat(l.Artifact.Manifest.Annotations[AnnotationMaxError], 64); err == nil && b > 0 {
		bound = b
	}
	v := &Verification{Scorer: l.Artifact.Desc.Digest.String(), Encoder: s.Encoder.Digest}
	fail := func(format string, args ...any) (*Verification, error) {
		v.Problems = append(v.Problems, fmt.Sprintf(format, args...))
		v.setBound(storage, bound)
		return v, nil
	}
	loc, err := artifact.FindEncoder(ctx, store, s.Encoder)
	if err != nil {
		if errkind.Is(err, errkind.BadInput) {
			return fail("the named encoder cannot be used: %v", err)
		}
		return nil, err
	}
	enc, err := artifact.Load(ctx, store, registry.Ref{Repository: loc.Repository, Digest: loc.Digest})
	if err != nil {
		return nil, fmt.Errorf("loading encoder %s: %w", s.Encoder.Digest, err)
	}
	if enc.Spec == nil || len(enc.Problems) > 0 {
		return nil, errkind.New(errkind.Integrity, "encoder %s@%s is damaged:\n  %s", loc.Repository, loc.Digest, strings.Join(enc.Problems, "\n  "))
	}
	if len(l.Problems) > 0 {
		return nil, errkind.New(errkind.Integrity, "scorer %s is damaged:\n  %s", ref, strings.Join(l.Problems, "\n  "))
	}
	if err := checkSparse(s, enc.Spec); err != nil {
		return fail("%v", err)
	}
	if probs := compareEncoderSide(s, enc.Spec, l.Tensors, enc.Tensors); len(probs) > 0 {
		v.Problems = append(v.Problems, probs...)
	}

	// The reference head: the source scorer's, when the store has it.
	headSpec, headW := s, l.Tensors
	v.Reference = "the scorer's own head, encoder " + s.Encoder.Digest + " run on its own"
	if from := s.Lineage.FrozenFrom; from != "" {
		src, err := findByDigest(ctx, store, from, l.Artifact.Repository)
		switch {
		case err != nil:
			return nil, err
		case src == nil:
			v.Notes = append(v.Notes, fmt.Sprintf("the source scorer %s is not in the store: the scorer's own head is the reference", from))
		case src.Spec == nil || len(src.Problems) > 0:
			return nil, errkind.New(errkind.Integrity, "source scorer %s is damaged:\n  %s", from, strings.Join(src.Problems, "\n  "))
		case src.Spec.Encoder == nil || src.Spec.Encoder.Digest != s.Encoder.Digest:
			return fail("the source scorer %s does not name encoder %s", from, s.Encoder.Digest)
		default:
			headSpec, headW = src.Spec, src.Tensors
			v.Source = from
			v.Reference = "source scorer " + from + " head, encoder " + s.Encoder.Digest + " run on its own"
		}
	}
	frozen, err := model.Compile(s, l.Tensors, nil)
	if err != nil {
		return fail("the scorer does not compile: %v", err)
	}
	var hs *holdoutSource
	if cfg.holdout != "" {
		n := cfg.rows
		if n <= 0 {
			n = DefaultHoldoutRows
		}
		hs = openHoldout(ctx, store, cfg.holdout, n)
	}
	sets, err := collectRows(s, l.Vocab, l.Probes, hs)
	if err != nil {
		return nil, err
	}
	defer sets.close()
	got, err := verifyNets(frozen, s, headSpec, headW, enc, sets.sets)
	if err != nil {
		return nil, err
	}
	got.Scorer, got.Encoder, got.Source, got.Reference = v.Scorer, v.Encoder, v.Source, v.Reference
	got.Problems = append(v.Problems, got.Problems...)
	got.Notes = append(v.Notes, got.Notes...)
	got.setBound(storage, bound)
	return got, nil
}

// findByDigest loads the manifest of digest from repo first, then from the
// store's other repositories when it can list them; nil when the store does
// not have it (or cannot be searched beyond repo).
func findByDigest(ctx context.Context, store registry.Store, digest, repo string) (*artifact.Loaded, error) {
	dg, err := registry.ParseDigest(digest)
	if err != nil {
		return nil, errkind.New(errkind.Integrity, "lineage.frozenFrom %q: %w", digest, err)
	}
	r, err := registry.FindManifest(ctx, store, dg, repo)
	if errors.Is(err, registry.ErrNotFound) || errors.Is(err, registry.ErrNoCatalog) {
		return nil, nil
	}
	if err != nil {
		return nil, err
	}
	return artifact.Load(ctx, store, registry.Ref{Repository: r, Digest: dg})
}

// compareEncoderSide requires each of s's encoder-side layers to be the
// encoder's layer of the same name: same op, inputs, tensors and
// activation, and bit-identical tensor values.
func compareEncoderSide(s, e *model.Spec, st, et map[string][]float32) []string {
	var out []string
	eLayers := map[string]model.Layer{}
	for _, l := range e.Layers {
		eLayers[l.Name] = l
	}
	for _, l := range s.Layers {
		el, ok := eLayers[l.Name]
		if !ok {
			continue
		}
		if l.Op != el.Op || act(l.Activation) != act(el.Activation) || l.Input != el.Input || !slices.Equal(l.Inputs, el.Inputs) ||
			l.Weight != el.Weight || l.Bias != el.Bias || l.TiedTo != el.TiedTo {
			out = append(out, fmt.Sprintf("layer %q is not the encoder's layer %q: %+v vs %+v", l.Name, el.Name, l, el))
			continue
		}
		for _, t := range layerTensors(l) {
			a, b := st[t[1]], et[t[1]]
			if len(a) != len(b) {
				out = append(out, fmt.Sprintf("tensor %q of layer %q has %d values, the encoder's has %d", t[1], l.Name, len(a), len(b)))
				continue
			}
			n, worst := 0, 0.0
			for i := range a {
				if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
					n++
					worst = math.Max(worst, math.Abs(float64(a[i])-float64(b[i])))
				}
			}
			if n > 0 {
				out = append(out, fmt.Sprintf("tensor %q of layer %q differs from the named encoder's in %d of %d values (max abs %.3g)", t[1], l.Name, n, len(a), worst))
			}
		}
	}
	return out
}

// setBound records the storage rule and decides Passed.
func (v *Verification) setBound(storage string, bound float64) {
	v.Storage = storage
	v.Exact = storage == StorageF32
	v.Bound = 0
	if !v.Exact {
		v.Bound = bound
	}
	if v.Outputs == 0 && len(v.Problems) == 0 {
		v.Problems = append(v.Problems, "no rows to compare on: the scorer has no probe rows and no holdout was given")
	}
	ok := v.Mismatches == 0
	if !v.Exact {
		ok = v.MaxAbs <= v.Bound
	}
	v.Passed = ok && len(v.Problems) == 0
}

func (v *Verification) rows() int {
	n := 0
	for _, s := range v.Sets {
		n += s.Rows
	}
	return n
}

func (v *Verification) summary() string {
	parts := []string{fmt.Sprintf("%d of %d outputs differ, max abs %.3g", v.Mismatches, v.Outputs, v.MaxAbs)}
	for _, s := range v.Sets {
		if s.Worst != nil {
			parts = append(parts, fmt.Sprintf("%s row %d column %d: %v, composition %v", s.Name, s.Worst.Row, s.Worst.Column, s.Worst.Got, s.Worst.Want))
		}
	}
	return strings.Join(append(parts, v.Problems...), "; ")
}

// composition evaluates the unfrozen composition: the encoder's net, and a
// head net reading the encoder layers it consumes as dense inputs.
type composition struct {
	enc, head *model.Net
	headOut   string
	feeds     [][2]string // encoder layer, dense input of the head net
}

// newComposition builds the reference of a scorer x (its head, its
// tensors w) on the encoder enc. The head net is an evaluation plan only,
// never stored: x's layers that are not encoder-side, with every read of
// an encoder layer turned into a dense input that the encoder's net fills.
func newComposition(x *model.Spec, w model.Weights, enc *artifact.Loaded) (*composition, error) {
	e := enc.Spec
	encNet, err := model.Compile(e, enc.Tensors, nil)
	if err != nil {
		return nil, fmt.Errorf("compiling encoder %s: %w", e.Name, err)
	}
	side := map[string]bool{}
	if x.Encoder.Embedded {
		if side, err = encoderSide(x, e); err != nil {
			return nil, err
		}
	}
	h := &model.Spec{SchemaVersion: 1, Kind: model.KindEncoder, Name: x.Name,
		Inputs: model.Inputs{Sparse: x.Inputs.Sparse, Dense: slices.Clone(x.Inputs.Dense)}, Code: x.Output, Output: x.Output}
	taken := map[string]bool{x.Inputs.Sparse[0].Name: true}
	for _, d := range x.Inputs.Dense {
		taken[d.Name] = true
	}
	for _, l := range x.Layers {
		taken[l.Name] = true
	}
	c := &composition{enc: encNet, headOut: x.Output}
	feedOf := map[string]string{}
	feed := func(name string) (string, error) {
		if f, ok := feedOf[name]; ok {
			return f, nil
		}
		width := encNet.Width(name)
		if width == 0 {
			return "", badInput("encoder %q has no layer %q, which scorer %q reads", e.Name, name, x.Name)
		}
		f := uniqueName("encoder_"+name, "feed_", func(s string) bool { return taken[s] })
		taken[f] = true
		feedOf[name] = f
		c.feeds = append(c.feeds, [2]string{name, f})
		h.Inputs.Dense = append(h.Inputs.Dense, model.DenseInput{Name: f, Size: width, Describes: model.DescribesUser})
		return f, nil
	}
	mapRef := func(r string) (string, error) {
		if n, ok := encoderRef(x, side, r); ok {
			return feed(n)
		}
		return r, nil
	}
	used := map[string]bool{}
	for _, l := range x.Layers {
		if side[l.Name] {
			continue
		}
		m := l
		if l.Input != "" {
			if m.Input, err = mapRef(l.Input); err != nil {
				return nil, err
			}
		}
		if len(l.Inputs) > 0 {
			m.Inputs = make([]string, len(l.Inputs))
			for i, r := range l.Inputs {
				if m.Inputs[i], err = mapRef(r); err != nil {
					return nil, err
				}
			}
		}
		for _, t := range layerTensors(l) {
			used[t[1]] = true
		}
		h.Layers = append(h.Layers, m)
	}
	if side[x.Output] {
		return nil, badInput("scorer %q: its output %q is an encoder layer", x.Name, x.Output)
	}
	for _, t := range x.Tensors {
		if used[t.Name] {
			h.Tensors = append(h.Tensors, t)
		}
	}
	if c.head, err = model.Compile(h, w, nil); err != nil {
		return nil, fmt.Errorf("compiling the head of scorer %q on its own: %w", x.Name, err)
	}
	return c, nil
}

// run computes the composition's output for a batch.
func (c *composition) run(b *model.Batch) ([]float32, error) {
	er := c.enc.NewRunner(1)
	defer er.Close()
	hb := *b
	hb.Dense = make(map[string][]float32, len(b.Dense)+len(c.feeds))
	for k, v := range b.Dense {
		hb.Dense[k] = v
	}
	for _, f := range c.feeds {
		out, err := er.Run(b, f[0], nil)
		if err != nil {
			return nil, fmt.Errorf("running encoder layer %q: %w", f[0], err)
		}
		hb.Dense[f[1]] = out
	}
	hr := c.head.NewRunner(1)
	defer hr.Close()
	return hr.Run(&hb, c.headOut, nil)
}

// runNet computes a net's layer for a batch.
func runNet(n *model.Net, b *model.Batch, layer string) ([]float32, error) {
	r := n.NewRunner(1)
	defer r.Close()
	return r.Run(b, layer, nil)
}

// verifyNets compares the frozen net's output with the composition of
// enc and the head of headSpec on every set; it keeps the frozen outputs
// in the sets. Storage and Passed are left to setBound.
func verifyNets(frozen *model.Net, fspec, headSpec *model.Spec, headW model.Weights, enc *artifact.Loaded, sets []*rowSet) (*Verification, error) {
	v := &Verification{}
	comp, err := newComposition(headSpec, headW, enc)
	if err != nil {
		// Only compile and naming problems come out of newComposition.
		v.Problems = append(v.Problems, err.Error())
		return v, nil
	}
	if fw, hw := frozen.Width(fspec.Output), comp.head.Width(comp.headOut); fw != hw {
		v.Problems = append(v.Problems, fmt.Sprintf("the scorer's output %q is %d wide, the composition's %q %d", fspec.Output, fw, comp.headOut, hw))
		return v, nil
	}
	width := frozen.Width(fspec.Output)
	for _, set := range sets {
		r := SetResult{Name: set.name, From: set.from, Rows: set.batch.Rows(), Total: set.total, Notes: set.notes}
		if r.Rows > 0 {
			got, err := runNet(frozen, set.batch, fspec.Output)
			if err != nil {
				return nil, fmt.Errorf("running the frozen scorer on the %s: %w", set.name, err)
			}
			set.out = got
			want, err := comp.run(set.batch)
			if err != nil {
				return nil, fmt.Errorf("running the composition on the %s: %w", set.name, err)
			}
			d := compare(got, want)
			r.Outputs, r.Mismatches, r.MaxAbs, r.MaxRel = d.Outputs, d.Mismatches, d.MaxAbs, d.MaxRel
			if d.worst >= 0 {
				r.Worst = &Deviation{Row: set.ids[d.worst/width], Column: d.worst % width, Got: got[d.worst], Want: want[d.worst],
					Abs: math.Abs(float64(got[d.worst]) - float64(want[d.worst]))}
			}
		}
		v.Sets = append(v.Sets, r)
		v.Outputs += r.Outputs
		v.Mismatches += r.Mismatches
		v.MaxAbs = math.Max(v.MaxAbs, r.MaxAbs)
		v.MaxRel = math.Max(v.MaxRel, r.MaxRel)
	}
	return v, nil
}

type delta struct {
	Delta
	worst int
}

// compare counts bitwise differences and the largest absolute and
// relative differences (relative to |want|; the absolute one where want is 0).
func compare(got, want []float32) delta {
	d := delta{Delta: Delta{Outputs: len(got)}, worst: -1}
	for i := range got {
		if math.Float32bits(got[i]) == math.Float32bits(want[i]) {
			continue
		}
		d.Mismatches++
		abs := math.Abs(float64(got[i]) - float64(want[i]))
		rel := abs
		if w := math.Abs(float64(want[i])); w > 0 {
			rel = abs / w
		}
		if abs > d.MaxAbs || d.worst < 0 {
			d.MaxAbs, d.worst = abs, i
		}
		d.MaxRel = math.Max(d.MaxRel, rel)
	}
	return d
}

// againstSource compares the frozen outputs kept in sets with the source
// scorer as stored, run by the runtime.
func againstSource(frozen *model.Net, src, enc *artifact.Loaded, sets []*rowSet) (*Delta, error) {
	var e *model.Encoder
	if !src.Spec.Encoder.Embedded {
		e = &model.Encoder{Spec: enc.Spec, Weights: enc.Tensors}
	}
	net, err := model.Compile(src.Spec, src.Tensors, e)
	if err != nil {
		return nil, fmt.Errorf("compiling the source scorer: %w", err)
	}
	total := &Delta{}
	for _, set := range sets {
		if set.batch.Rows() == 0 {
			continue
		}
		want, err := runNet(net, set.batch, src.Spec.Output)
		if err != nil {
			return nil, fmt.Errorf("running the source scorer on the %s: %w", set.name, err)
		}
		d := compare(set.out, want)
		total.Outputs += d.Outputs
		total.Mismatches += d.Mismatches
		total.MaxAbs = math.Max(total.MaxAbs, d.MaxAbs)
		total.MaxRel = math.Max(total.MaxRel, d.MaxRel)
	}
	return total, nil
}

// subjectOf describes a manifest as an OCI subject descriptor.
func subjectOf(d v1.Descriptor) *v1.Descriptor {
	return &v1.Descriptor{MediaType: d.MediaType, Digest: d.Digest, Size: d.Size}
}
