package model

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model/kernel"
)

// This file is the reference runtime's compiler: it checks a spec (and the
// encoder a scorer uses) against its tensors and turns it into a Net, an
// immutable evaluation plan. runtime_run.go evaluates a Net.
//
// The semantics a Net implements, which the gate relies on:
//
//   - Layers are evaluated in the order the spec lists them. A layer's input
//     names the sparse input (sparse_dense only), a dense input, or an earlier
//     layer. A layer is computed only when the requested layer depends on it.
//   - sparse_dense: out = act(x·W + b), x the row's canonical sparse vector
//     (see Runner.Run), W of shape [Rows(), out], b of shape [out].
//   - dense: out = act(in·W + b), W of shape [in, out], b of shape [out].
//   - concat: the inputs' values side by side, in the listed order.
//   - tied_decoder: out = act(in·Wᵀ + b), where W = tiedTo is the weight of a
//     sparse_dense layer of the same net, of shape [Rows(), H]; the input has
//     width H, the output width Rows(), b (optional) shape [Rows()].
//   - An absent bias is zero; an absent activation is identity.
//   - Dropout listed in the spec's training state is the identity at
//     inference; the Net ignores it and lists it (Net.Dropout).
//   - All arithmetic is float32 except the sparse input's duplicate merge and
//     value transform, which run in float64 and round once to float32.

// Weights maps a tensor name to its values, float32 in row-major (C) order.
type Weights map[string][]float32

// Encoder is an encoder model given to Compile next to a scorer that refers
// to it without embedding it: its spec (Kind "encoder") and its weights.
type Encoder struct {
	Spec    *Spec
	Weights Weights
}

// Net is a compiled model: immutable after Compile, safe to share between
// goroutines. Evaluate it with a Runner (NewRunner).
type Net struct {
	kind       string
	sparse     SparseInput
	rows       int   // sparse weight rows: sparse.Rows()
	unknownIdx int32 // the unknown bucket's index, or -1
	dense      []DenseInput
	layers     []*netLayer
	byName     map[string]int

	output, code, recon string
	dropout             []Dropout
}

type srcKind uint8

const (
	srcDense srcKind = iota + 1 // a dense input of the batch
	srcLayer                    // an earlier layer
)

// source is one input of a layer other than the sparse input.
type source struct {
	kind  srcKind
	i     int // index into Net.dense or Net.layers
	width int
}

type netLayer struct {
	name  string
	op    string
	srcs  []source // dense, tied_decoder: one; concat: several; sparse_dense: none
	width int
	inW   int       // input width (dense, tied_decoder)
	w     []float32 // sparse_dense, tied_decoder: the [Rows(), H] weight, a copy owned by the Net
	// packed is the weight of a dense layer, or the transposed weight of a
	// tied_decoder, packed for the kernels.
	packed *kernel.Packed
	bias   []float32 // nil when absent
	act    activation

	plan      []int // layers needed to compute this one, ascending, ending with itself
	denseUsed []int // dense inputs the plan reads
}

// Compile checks spec against its weights and returns the evaluation plan.
//
// enc must be given exactly when spec is a scorer whose encoder is not
// embedded (spec.Encoder.Embedded false): Compile then merges the encoder's
// layers, named "encoder/<layer>", before the scorer's, and the scorer's
// layers refer to them by those names. The scorer's sparse input must equal
// the encoder's in name, vocabulary size, unknown rule, transform and
// duplicates rule. When the encoder is embedded its layers and tensors
// (part "encoder") are in the scorer's spec, enc must be nil, and
// "encoder/" references are refused; spec.Encoder.Output then names one of
// the spec's own layers, all of whose tensors must be of part "encoder".
//
// Compile checks that names are unique, that references resolve to an input
// or an earlier layer, that every tensor a layer uses is declared, present,
// of the declared shape, finite, not training state (part "training" or an
// optimizer slot), and of the shape the layer needs; and that the Output,
// Code and Reconstruction layers exist. It reports every problem it finds,
// each naming the layer and tensor and giving the shapes; the error is of
// kind errkind.BadInput. Compile copies the weights it uses: later changes to
// w or enc do not affect the Net.
func Compile(spec *Spec, w Weights, enc *Encoder) (*Net, error) {
	return compile(spec, w, enc, false)
}

// CheckGraph runs every check of Compile that depends only on the specs —
// names, references, shapes declared in the spec, a scorer's encoder — and
// none on tensor values, which it neither reads nor copies. A nil error
// means Compile succeeds on any weights of the declared shapes with finite
// values. encoder is the referenced encoder's spec (nil otherwise).
func CheckGraph(spec *Spec, encoder *Spec) error {
	var enc *Encoder
	if encoder != nil {
		enc = &Encoder{Spec: encoder}
	}
	_, err := compile(spec, nil, enc, true)
	return err
}

func compile(spec *Spec, w Weights, enc *Encoder, shapesOnly bool) (*Net, error) {
	c := &compiler{tensors: map[string]tensorRef{}, names: map[string]source{}, slots: map[string]bool{}, shapesOnly: shapesOnly}
	net, err := c.compile(spec, w, enc)
	if err != nil {
		return nil, err
	}
	return net, nil
}

// tensorRef is a tensor in the merged namespace of a scorer and its encoder.
type tensorRef struct {
	meta   Tensor
	values []float32
	part   string // "" for the spec given to Compile, "encoder" for a referenced encoder
	found  bool   // values present in the weights map
}

type compiler struct {
	errs    []error
	net     *Net
	tensors map[string]tensorRef
	names   map[string]source // dense inputs and layers by (merged) name
	sparse  string            // the sparse input's name
	slots   map[string]bool   // optimizer slot tensors (merged names)
	// weightOf maps a merged tensor name used as a sparse_dense weight to its layer.
	weightOf map[string]*netLayer
	// tensorUse records which merged tensors each layer uses, for the embedded check.
	tensorUse map[int][]string
	// shapesOnly checks the graph against the tensors' declared shapes
	// without looking at (or copying) any value (CheckGraph).
	shapesOnly bool
}

func (c *compiler) errorf(format string, args ...any) {
	c.errs = append(c.errs, fmt.Errorf(format, args...))
}

func (c *compiler) compile(spec *Spec, w Weights, enc *Encoder) (*Net, error) {
	if spec == nil {
		return nil, errkind.New(errkind.BadInput, "compiling model: no spec")
	}
	c.net = &Net{kind: spec.Kind, byName: map[string]int{}, unknownIdx: -1}
	c.weightOf = map[string]*netLayer{}
	c.tensorUse = map[int][]string{}
	switch spec.Kind {
	case KindEncoder:
		if spec.Encoder != nil {
			c.errorf("encoder %q: an encoder cannot use an encoder", spec.Name)
		}
		if enc != nil {
			c.errorf("encoder %q: an encoder was given for a model that is itself an encoder", spec.Name)
		}
	case KindScorer:
		if spec.Encoder == nil {
			c.errorf("scorer %q: no encoder reference", spec.Name)
		}
	default:
		c.errorf("model %q: unknown kind %q", spec.Name, spec.Kind)
	}
	if len(spec.Inputs.Sparse) != 1 {
		c.errorf("model %q: %d sparse inputs, want exactly 1", spec.Name, len(spec.Inputs.Sparse))
		return nil, c.result()
	}
	sp := spec.Inputs.Sparse[0]
	c.checkSparse(spec.Name, sp)
	c.net.sparse = sp
	c.net.rows = sp.Rows()
	if sp.Unknown == UnknownBucket {
		c.net.unknownIdx = int32(sp.VocabularySize)
	}
	c.sparse = sp.Name
	for _, d := range spec.Inputs.Dense {
		c.addDense(d)
	}
	c.addTensors(spec, w, "", "")

	embedded := spec.Encoder != nil && spec.Encoder.Embedded
	external := spec.Kind == KindScorer && spec.Encoder != nil && !embedded
	if embedded && enc != nil {
		c.errorf("scorer %q: its encoder is embedded, but an encoder was also given", spec.Name)
	}
	if external {
		switch {
		case enc == nil || enc.Spec == nil:
			c.errorf("scorer %q: uses encoder %s by reference, but no encoder was given", spec.Name, spec.Encoder.Digest)
		case enc.Spec.Kind != KindEncoder:
			c.errorf("scorer %q: the given encoder %q is of kind %q, not %q", spec.Name, enc.Spec.Name, enc.Spec.Kind, KindEncoder)
		default:
			c.mergeEncoder(spec, enc)
		}
	}

	if spec.Training != nil {
		for _, s := range spec.Training.OptimizerSlots {
			c.slots[s.Tensor] = true
		}
	}
	for _, l := range spec.Layers {
		c.addLayer(l, "", !external)
	}
	// Dropout is identity at inference; it must still name a layer.
	if spec.Training != nil {
		for _, d := range spec.Training.Dropout {
			c.addDropout(d, "")
		}
	}

	c.net.output = spec.Output
	c.requireLayer("output", spec.Output)
	if spec.Kind == KindEncoder {
		if spec.Code == "" {
			c.errorf("encoder %q: no code layer", spec.Name)
		} else {
			c.requireLayer("code", spec.Code)
		}
		c.net.code = spec.Code
	}
	if spec.Reconstruction != "" {
		c.requireLayer("reconstruction", spec.Reconstruction)
		c.net.recon = spec.Reconstruction
	}
	if spec.Encoder != nil && spec.Encoder.Output != "" {
		if external {
			if enc != nil && enc.Spec != nil {
				c.requireLayer("encoder output", EncoderPrefix+spec.Encoder.Output)
			}
		} else {
			c.requireLayer("encoder output", spec.Encoder.Output)
			c.checkEmbeddedParts(spec.Encoder.Output)
		}
	} else if spec.Encoder != nil {
		c.errorf("scorer %q: the encoder reference names no output layer", spec.Name)
	}
	if len(c.errs) > 0 {
		return nil, c.result()
	}
	c.plan()
	return c.net, nil
}

func (c *compiler) result() error {
	if len(c.errs) == 0 {
		return nil
	}
	return errkind.Wrap(errkind.BadInput, fmt.Errorf("compiling model: %w", errors.Join(c.errs...)))
}

func (c *compiler) checkSparse(model string, sp SparseInput) {
	if sp.VocabularySize < 1 {
		c.errorf("sparse input %q: vocabulary size %d, want at least 1", sp.Name, sp.VocabularySize)
	}
	if sp.VocabularySize > math.MaxInt32-1 {
		c.errorf("sparse input %q: vocabulary size %d is too large", sp.Name, sp.VocabularySize)
	}
	if !slices.Contains([]string{UnknownBucket, UnknownDrop, UnknownRefuse}, sp.Unknown) {
		c.errorf("sparse input %q: unknown-id rule %q is not one of bucket, drop, refuse", sp.Name, sp.Unknown)
	}
	if !slices.Contains([]string{TransformIdentity, TransformLog1p, TransformBinary}, sp.Transform) {
		c.errorf("sparse input %q: transform %q is not one of identity, log1p, binary", sp.Name, sp.Transform)
	}
	if !slices.Contains([]string{DuplicatesSum, DuplicatesMax, DuplicatesRefuse}, sp.Duplicates) {
		c.errorf("sparse input %q: duplicates rule %q is not one of sum, max, refuse", sp.Name, sp.Duplicates)
	}
	if c.nameTaken(sp.Name) {
		c.errorf("sparse input %q: name used twice", sp.Name)
	}
	if strings.HasPrefix(sp.Name, EncoderPrefix) {
		c.errorf("sparse input %q: names starting with %q are reserved for encoder layers", sp.Name, EncoderPrefix)
	}
}

func (c *compiler) nameTaken(name string) bool {
	_, ok := c.names[name]
	return ok || (c.sparse != "" && name == c.sparse)
}

func (c *compiler) addDense(d DenseInput) {
	switch {
	case c.nameTaken(d.Name):
		c.errorf("dense input %q: name used twice", d.Name)
		return
	case d.Size < 1:
		c.errorf("dense input %q: size %d, want at least 1", d.Name, d.Size)
		return
	case strings.HasPrefix(d.Name, EncoderPrefix):
		c.errorf("dense input %q: names starting with %q are reserved for encoder layers", d.Name, EncoderPrefix)
		return
	}
	c.names[d.Name] = source{kind: srcDense, i: len(c.net.dense), width: d.Size}
	c.net.dense = append(c.net.dense, d)
}

// addTensors declares spec's tensors under prefix+name with values from w.
func (c *compiler) addTensors(spec *Spec, w Weights, prefix, part string) {
	for _, t := range spec.Tensors {
		name := prefix + t.Name
		if _, dup := c.tensors[name]; dup {
			c.errorf("tensor %q: declared twice", name)
			continue
		}
		v, ok := w[t.Name]
		c.tensors[name] = tensorRef{meta: t, values: v, part: part, found: ok}
	}
}

// mergeEncoder adds a referenced encoder's inputs check, tensors, layers and
// dropout under the "encoder/" prefix.
func (c *compiler) mergeEncoder(scorer *Spec, enc *Encoder) {
	es := enc.Spec
	if es.Encoder != nil {
		c.errorf("encoder %q: an encoder cannot itself use an encoder", es.Name)
	}
	if len(es.Inputs.Sparse) != 1 {
		c.errorf("encoder %q: %d sparse inputs, want exactly 1", es.Name, len(es.Inputs.Sparse))
		return
	}
	a, b := scorer.Inputs.Sparse[0], es.Inputs.Sparse[0]
	if a.Name != b.Name || a.VocabularySize != b.VocabularySize || a.Unknown != b.Unknown ||
		a.Transform != b.Transform || a.Duplicates != b.Duplicates {
		c.errorf("scorer %q: sparse input {name %q, vocabularySize %d, unknown %s, transform %s, duplicates %s} differs from encoder %q's {name %q, vocabularySize %d, unknown %s, transform %s, duplicates %s}",
			scorer.Name, a.Name, a.VocabularySize, a.Unknown, a.Transform, a.Duplicates,
			es.Name, b.Name, b.VocabularySize, b.Unknown, b.Transform, b.Duplicates)
		return
	}
	for _, d := range es.Inputs.Dense {
		s, ok := c.names[d.Name]
		if !ok || s.kind != srcDense || s.width != d.Size {
			c.errorf("encoder %q: dense input %q (size %d) is not a dense input of the same size of the scorer", es.Name, d.Name, d.Size)
		}
	}
	c.addTensors(es, enc.Weights, EncoderPrefix, KindEncoder)
	if es.Training != nil {
		for _, s := range es.Training.OptimizerSlots {
			c.slots[EncoderPrefix+s.Tensor] = true
		}
	}
	inputs := map[string]bool{b.Name: true}
	for _, d := range es.Inputs.Dense {
		inputs[d.Name] = true
	}
	for _, l := range es.Layers {
		for _, ref := range append([]string{l.Input}, l.Inputs...) {
			if strings.HasPrefix(ref, EncoderPrefix) {
				c.errorf("encoder %q: layer %q: input %q: an encoder cannot refer to encoder layers", es.Name, l.Name, ref)
			}
		}
		m := l
		m.Name = EncoderPrefix + l.Name
		rename := func(ref string) string {
			if ref == "" || inputs[ref] || strings.HasPrefix(ref, EncoderPrefix) {
				return ref
			}
			return EncoderPrefix + ref
		}
		m.Input = rename(l.Input)
		m.Inputs = make([]string, len(l.Inputs))
		for i, r := range l.Inputs {
			m.Inputs[i] = rename(r)
		}
		if l.Weight != "" {
			m.Weight = EncoderPrefix + l.Weight
		}
		if l.TiedTo != "" {
			m.TiedTo = EncoderPrefix + l.TiedTo
		}
		if l.Bias != "" {
			m.Bias = EncoderPrefix + l.Bias
		}
		c.addLayer(m, EncoderPrefix, false)
	}
	if es.Training != nil {
		for _, d := range es.Training.Dropout {
			c.addDropout(d, EncoderPrefix)
		}
	}
}

func (c *compiler) addDropout(d Dropout, prefix string) {
	d.Layer = prefix + d.Layer
	if _, ok := c.net.byName[d.Layer]; !ok {
		c.errorf("dropout: layer %q does not exist", d.Layer)
		return
	}
	c.net.dropout = append(c.net.dropout, d)
}

// addLayer compiles one layer; prefix is "encoder/" for a merged encoder's
// layers. refuseEncoderRefs is true when "encoder/" references cannot resolve.
func (c *compiler) addLayer(l Layer, prefix string, refuseEncoderRefs bool) {
	where := fmt.Sprintf("layer %q", l.Name)
	if l.Name == "" {
		c.errorf("a layer has no name")
		return
	}
	if c.nameTaken(l.Name) {
		c.errorf("%s: name used twice", where)
		return
	}
	if prefix == "" && strings.HasPrefix(l.Name, EncoderPrefix) {
		c.errorf("%s: names starting with %q are reserved for encoder layers", where, EncoderPrefix)
		return
	}
	nl := &netLayer{name: l.Name, op: l.Op, width: -1}
	idx := len(c.net.layers)
	ok := true
	bad := func(format string, args ...any) {
		c.errorf(where+": "+format, args...)
		ok = false
	}
	var err error
	nl.act, err = parseActivation(l.Activation)
	if err != nil {
		bad("%v", err)
	}
	// resolve finds a dense input or an earlier layer.
	resolve := func(ref string) (source, bool) {
		if ref == c.sparse {
			bad("input %q is the sparse input, which only a sparse_dense layer can read", ref)
			return source{}, false
		}
		if refuseEncoderRefs && strings.HasPrefix(ref, EncoderPrefix) {
			bad("input %q refers to an encoder layer, but this model has no encoder by reference (embedded or an encoder itself: refer to the layer by its own name)", ref)
			return source{}, false
		}
		s, found := c.names[ref]
		if !found {
			bad("input %q is neither an input nor an earlier layer", ref)
			return source{}, false
		}
		if s.width < 0 {
			ok = false // the input layer had an error, already reported
			return source{}, false
		}
		return s, true
	}
	forbid := func(field, value string) {
		if value != "" {
			bad("a %s layer takes no %s (got %q)", l.Op, field, value)
		}
	}
	var used []string
	switch l.Op {
	case OpSparseDense:
		forbid("tiedTo", l.TiedTo)
		if len(l.Inputs) > 0 {
			bad("a sparse_dense layer takes one input, not a list")
		}
		if l.Input != c.sparse {
			bad("input %q is not the sparse input %q", l.Input, c.sparse)
		}
		if l.Weight == "" {
			bad("no weight")
			break
		}
		used = append(used, l.Weight)
		wt, fine := c.tensor(where, l.Weight, 2)
		if !fine {
			ok = false
			break
		}
		if wt.meta.Shape[0] != c.net.rows {
			bad("weight %q has shape %v, want [%d, out]: the sparse input %q has %d rows (vocabulary %d%s)",
				l.Weight, wt.meta.Shape, c.net.rows, c.sparse, c.net.rows, c.net.sparse.VocabularySize, bucketNote(c.net.sparse))
			break
		}
		nl.inW = c.net.rows
		nl.width = wt.meta.Shape[1]
		if !c.shapesOnly {
			nl.w = slices.Clone(wt.values)
		}
		c.weightOf[l.Weight] = nl
	case OpDense:
		forbid("tiedTo", l.TiedTo)
		if len(l.Inputs) > 0 {
			bad("a dense layer takes one input, not a list")
		}
		s, fine := resolve(l.Input)
		if !fine {
			break
		}
		nl.srcs = []source{s}
		nl.inW = s.width
		if l.Weight == "" {
			bad("no weight")
			break
		}
		used = append(used, l.Weight)
		wt, fine := c.tensor(where, l.Weight, 2)
		if !fine {
			ok = false
			break
		}
		if wt.meta.Shape[0] != s.width {
			bad("weight %q has shape %v, want [%d, out]: input %q has width %d", l.Weight, wt.meta.Shape, s.width, l.Input, s.width)
			break
		}
		nl.width = wt.meta.Shape[1]
		if !c.shapesOnly {
			nl.packed = kernel.PackB(s.width, nl.width, wt.values)
		}
	case OpConcat:
		forbid("input", l.Input)
		forbid("weight", l.Weight)
		forbid("tiedTo", l.TiedTo)
		forbid("bias", l.Bias)
		forbid("activation", l.Activation)
		if len(l.Inputs) == 0 {
			bad("a concat layer needs a list of inputs")
		}
		width := 0
		for _, ref := range l.Inputs {
			s, fine := resolve(ref)
			if fine {
				nl.srcs = append(nl.srcs, s)
				width += s.width
			}
		}
		if ok {
			nl.width = width
		}
	case OpTiedDecoder:
		forbid("weight", l.Weight)
		if len(l.Inputs) > 0 {
			bad("a tied_decoder layer takes one input, not a list")
		}
		s, fine := resolve(l.Input)
		if !fine {
			break
		}
		nl.srcs = []source{s}
		nl.inW = s.width
		if l.TiedTo == "" {
			bad("no tiedTo tensor")
			break
		}
		used = append(used, l.TiedTo)
		enc, isWeight := c.weightOf[l.TiedTo]
		if !isWeight {
			bad("tiedTo %q is not the weight of an earlier sparse_dense layer", l.TiedTo)
			break
		}
		wt := c.tensors[l.TiedTo]
		if wt.meta.Shape[1] != s.width {
			bad("tiedTo %q (layer %q) has shape %v, want [%d, %d]: input %q has width %d",
				l.TiedTo, enc.name, wt.meta.Shape, c.net.rows, s.width, l.Input, s.width)
			break
		}
		nl.width = c.net.rows
		nl.w = enc.w // shared, both immutable
		if !c.shapesOnly {
			nl.packed = kernel.PackBT(s.width, c.net.rows, enc.w)
		}
	default:
		bad("unknown op %q", l.Op)
	}
	if l.Bias != "" && l.Op != OpConcat {
		used = append(used, l.Bias)
		bt, fine := c.tensor(where, l.Bias, 1)
		switch {
		case !fine:
			ok = false
		case nl.width >= 0 && bt.meta.Shape[0] != nl.width:
			bad("bias %q has shape %v, want [%d]", l.Bias, bt.meta.Shape, nl.width)
		default:
			nl.bias = slices.Clone(bt.values)
		}
	}
	if !ok {
		nl.width = -1
	}
	c.tensorUse[idx] = used
	c.names[l.Name] = source{kind: srcLayer, i: idx, width: nl.width}
	c.net.byName[l.Name] = idx
	c.net.layers = append(c.net.layers, nl)
}

func bucketNote(s SparseInput) string {
	if s.Unknown == UnknownBucket {
		return " + the unknown bucket"
	}
	return ""
}

// tensor finds a tensor a layer uses and checks it is usable with the given
// number of dimensions.
func (c *compiler) tensor(where, name string, dims int) (tensorRef, bool) {
	t, ok := c.tensors[name]
	if !ok {
		c.errorf("%s: tensor %q is not declared", where, name)
		return t, false
	}
	if t.meta.Part == "training" {
		c.errorf("%s: tensor %q is training state (part %q) and cannot be used by a layer", where, name, t.meta.Part)
		return t, false
	}
	if c.slots[name] {
		c.errorf("%s: tensor %q is an optimizer slot and cannot be used by a layer", where, name)
		return t, false
	}
	if len(t.meta.Shape) != dims {
		c.errorf("%s: tensor %q has shape %v, want %d dimensions", where, name, t.meta.Shape, dims)
		return t, false
	}
	n := 1
	for _, d := range t.meta.Shape {
		if d < 1 {
			c.errorf("%s: tensor %q has shape %v with a dimension below 1", where, name, t.meta.Shape)
			return t, false
		}
		n *= d
	}
	if c.shapesOnly {
		return t, true
	}
	if !t.found {
		c.errorf("%s: tensor %q (shape %v) has no values", where, name, t.meta.Shape)
		return t, false
	}
	if len(t.values) != n {
		c.errorf("%s: tensor %q has %d values, its shape %v needs %d", where, name, len(t.values), t.meta.Shape, n)
		return t, false
	}
	for i, v := range t.values {
		if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) {
			c.errorf("%s: tensor %q (shape %v) has a non-finite value %v at flat position %d", where, name, t.meta.Shape, v, i)
			return t, false
		}
	}
	return t, true
}

func (c *compiler) requireLayer(role, name string) {
	if name == "" {
		c.errorf("the %s layer is not named", role)
		return
	}
	if _, ok := c.net.byName[name]; !ok {
		c.errorf("the %s layer %q does not exist", role, name)
	}
}

// checkEmbeddedParts requires every tensor an embedded encoder's output
// depends on to be of part "encoder".
func (c *compiler) checkEmbeddedParts(output string) {
	idx, ok := c.net.byName[output]
	if !ok {
		return
	}
	seen := map[int]bool{}
	var visit func(i int)
	visit = func(i int) {
		if seen[i] {
			return
		}
		seen[i] = true
		for _, s := range c.net.layers[i].srcs {
			if s.kind == srcLayer {
				visit(s.i)
			}
		}
		for _, t := range c.tensorUse[i] {
			if r, ok := c.tensors[t]; ok && r.meta.Part != KindEncoder {
				c.errorf("layer %q: tensor %q is of part %q, but it computes the embedded encoder's output %q and must be of part %q",
					c.net.layers[i].name, t, r.meta.Part, output, KindEncoder)
			}
		}
	}
	visit(idx)
}

// plan records, for every layer, the layers and dense inputs it needs.
func (c *compiler) plan() {
	for i, l := range c.net.layers {
		need := make([]bool, i+1)
		need[i] = true
		for j := i; j >= 0; j-- {
			if !need[j] {
				continue
			}
			for _, s := range c.net.layers[j].srcs {
				if s.kind == srcLayer {
					need[s.i] = true
				}
			}
		}
		dense := make([]bool, len(c.net.dense))
		for j, n := range need {
			if !n {
				continue
			}
			l.plan = append(l.plan, j)
			for _, s := range c.net.layers[j].srcs {
				if s.kind == srcDense {
					dense[s.i] = true
				}
			}
		}
		for j, d := range dense {
			if d {
				l.denseUsed = append(l.denseUsed, j)
			}
		}
	}
}

// Layers lists the net's layers in evaluation order. A referenced encoder's
// layers come first, named "encoder/<layer>".
func (n *Net) Layers() []string {
	out := make([]string, len(n.layers))
	for i, l := range n.layers {
		out[i] = l.name
	}
	return out
}

// Width is the number of values per row that layer outputs, or 0 when the
// net has no such layer.
func (n *Net) Width(layer string) int {
	i, ok := n.byName[layer]
	if !ok {
		return 0
	}
	return n.layers[i].width
}

// Output names the model's output layer (the spec's Output).
func (n *Net) Output() string { return n.output }

// Code names an encoder's code layer, or "" for a scorer.
func (n *Net) Code() string { return n.code }

// Reconstruction names the decoder output layer, or "" when the model has none.
func (n *Net) Reconstruction() string { return n.recon }

// Sparse is the net's sparse input.
func (n *Net) Sparse() SparseInput { return n.sparse }

// Dense lists the net's dense inputs; a Batch holds one Rows()×Size matrix
// for each dense input the requested layer depends on.
func (n *Net) Dense() []DenseInput { return slices.Clone(n.dense) }

// Dropout lists the dropout the spec's training state declares (a
// referenced encoder's under "encoder/" names). The runtime ignores it:
// dropout is the identity at inference.
func (n *Net) Dropout() []Dropout { return slices.Clone(n.dropout) }
