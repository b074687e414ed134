package model

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
)

// modelBuilder assembles a spec and its weights for tests.
type modelBuilder struct {
	spec *Spec
	w    Weights
}

// pair is a sparse (index, value) pair.
type pair struct {
	idx int32
	val float32
}

func newModel(kind, name string, sp SparseInput) *modelBuilder {
	s := &Spec{SchemaVersion: 1, Kind: kind, Name: name, Inputs: Inputs{Sparse: []SparseInput{sp}}}
	return &modelBuilder{spec: s, w: Weights{}}
}

func (m *modelBuilder) tensor(name, part string, shape []int, vals []float32) *modelBuilder {
	m.spec.Tensors = append(m.spec.Tensors, Tensor{Name: name, File: part + ".safetensors", Shape: shape, DType: "F32", Part: part})
	if vals != nil {
		m.w[name] = vals
	}
	return m
}

func (m *modelBuilder) layer(l Layer) *modelBuilder {
	m.spec.Layers = append(m.spec.Layers, l)
	return m
}

func (m *modelBuilder) dense(name string, size int) *modelBuilder {
	m.spec.Inputs.Dense = append(m.spec.Inputs.Dense, DenseInput{Name: name, Size: size, Describes: DescribesUser})
	return m
}

// randTensor adds a tensor of normal values scaled by 1/sqrt(fanIn).
func (m *modelBuilder) randTensor(rng *rand.Rand, name, part string, shape ...int) *modelBuilder {
	n := 1
	for _, d := range shape {
		n *= d
	}
	scale := 1 / math.Sqrt(float64(shape[0]))
	if len(shape) == 1 {
		scale = 0.5
	}
	v := make([]float32, n)
	for i := range v {
		v[i] = float32(rng.NormFloat64() * scale)
	}
	return m.tensor(name, part, shape, v)
}

func mustCompile(t testing.TB, s *Spec, w Weights, enc *Encoder) *Net {
	t.Helper()
	n, err := Compile(s, w, enc)
	if err != nil {
		t.Fatalf("compile %q: %v", s.Name, err)
	}
	return n
}

// batchOf builds a batch from per-row pairs and dense matrices.
func batchOf(rows [][]pair, dense map[string][]float32) *Batch {
	b := &Batch{Indptr: []int32{0}, Dense: dense}
	for _, r := range rows {
		for _, p := range r {
			b.Indices = append(b.Indices, p.idx)
			b.Values = append(b.Values, p.val)
		}
		b.Indptr = append(b.Indptr, int32(len(b.Indices)))
	}
	return b
}

// rowsOf splits a batch back into rows of pairs and per-row dense values.
func rowsOf(b *Batch) ([][]pair, map[string][][]float32) {
	n := b.Rows()
	rows := make([][]pair, n)
	for r := 0; r < n; r++ {
		for p := b.Indptr[r]; p < b.Indptr[r+1]; p++ {
			rows[r] = append(rows[r], pair{b.Indices[p], b.Values[p]})
		}
	}
	dense := map[string][][]float32{}
	for k, m := range b.Dense {
		size := len(m) / max(n, 1)
		for r := 0; r < n; r++ {
			dense[k] = append(dense[k], m[r*size:(r+1)*size])
		}
	}
	return rows, dense
}

// subBatch builds a batch of the given rows of b, in the given order.
func subBatch(b *Batch, order []int) *Batch {
	rows, dense := rowsOf(b)
	sel := make([][]pair, len(order))
	dm := map[string][]float32{}
	for i, r := range order {
		sel[i] = rows[r]
		for k := range dense {
			dm[k] = append(dm[k], dense[k][r]...)
		}
	}
	for k := range dense {
		if dm[k] == nil {
			dm[k] = []float32{}
		}
	}
	return batchOf(sel, dm)
}

// options of a random test case.
type caseOpts struct {
	transform, duplicates, unknown string
	vocab, hidden, code            int
	twoLayerEncoder                bool
	decoderBias                    bool
	rows                           int
}

// testCase is a random encoder, a scorer using it by reference, the same
// scorer with the encoder embedded, and a batch.
type testCase struct {
	opts     caseOpts
	encoder  *modelBuilder
	scorer   *modelBuilder // encoder by reference
	embedded *modelBuilder // the same scorer, encoder embedded
	batch    *Batch
}

// randomCase builds a test case. Row i is generated so that the batch has
// empty rows, repeated indices (unless the rule is refuse, where only the
// unknown bucket repeats), the unknown bucket, zero and fractional values.
func randomCase(seed uint64, o caseOpts) *testCase {
	rng := rand.New(rand.NewPCG(seed, 0x5eed))
	sp := SparseInput{Name: "episodes_played", VocabularySize: o.vocab, Unknown: o.unknown,
		Transform: o.transform, Duplicates: o.duplicates, Vocabulary: "vocab.txt"}
	rowsW := sp.Rows()
	tc := &testCase{opts: o}

	enc := newModel(KindEncoder, "listener-encoder", sp)
	enc.randTensor(rng, "enc.w1", "encoder", rowsW, o.hidden).randTensor(rng, "enc.b1", "encoder", o.hidden)
	if o.twoLayerEncoder {
		enc.layer(Layer{Name: "h1", Op: OpSparseDense, Input: sp.Name, Weight: "enc.w1", Bias: "enc.b1", Activation: ActReLU})
		enc.randTensor(rng, "enc.w2", "encoder", o.hidden, o.code).randTensor(rng, "enc.b2", "encoder", o.code)
		enc.layer(Layer{Name: "code", Op: OpDense, Input: "h1", Weight: "enc.w2", Bias: "enc.b2", Activation: ActTanh})
		enc.randTensor(rng, "dec.w1", "decoder", o.code, o.hidden)
		enc.layer(Layer{Name: "dec_h", Op: OpDense, Input: "code", Weight: "dec.w1", Activation: ActReLU})
		dec := Layer{Name: "recon", Op: OpTiedDecoder, Input: "dec_h", TiedTo: "enc.w1", Activation: ActSigmoid}
		if o.decoderBias {
			enc.randTensor(rng, "dec.b", "decoder", rowsW)
			dec.Bias = "dec.b"
		}
		enc.layer(dec)
	} else {
		o.code = o.hidden
		tc.opts.code = o.hidden
		enc.layer(Layer{Name: "code", Op: OpSparseDense, Input: sp.Name, Weight: "enc.w1", Bias: "enc.b1", Activation: ActTanh})
		dec := Layer{Name: "recon", Op: OpTiedDecoder, Input: "code", TiedTo: "enc.w1"}
		if o.decoderBias {
			enc.randTensor(rng, "dec.b", "decoder", rowsW)
			dec.Bias = "dec.b"
		}
		enc.layer(dec)
	}
	enc.spec.Code, enc.spec.Reconstruction, enc.spec.Output = "code", "recon", "code"
	enc.spec.Training = &TrainingState{Dropout: []Dropout{{Layer: "code", Rate: 0.1}}}
	tc.encoder = enc

	// The scorer: concat(code, user features, a wide sparse part) → 16 relu → 1 sigmoid.
	ref := &EncoderRef{Name: "listener-encoder:prod", Digest: "sha256:" + fmt.Sprintf("%064x", seed), Output: "code"}
	sc := newModel(KindScorer, "promo-scorer", sp).dense("listener_features", 5).dense("show_features", 3)
	sc.randTensor(rng, "wide.w", "head", rowsW, 4).randTensor(rng, "wide.b", "head", 4)
	sc.randTensor(rng, "h.w", "head", o.code+5+4+3, 16).randTensor(rng, "h.b", "head", 16)
	sc.randTensor(rng, "out.w", "head", 16, 1).randTensor(rng, "out.b", "head", 1)
	sc.tensor("out.w.m", "training", []int{16, 1}, make([]float32, 16))
	sc.spec.Training = &TrainingState{OptimizerSlots: []OptimizerSlot{{Tensor: "out.w.m", Of: "out.w", Slot: "m"}}}
	scorerLayers := func(code string) []Layer {
		return []Layer{
			{Name: "wide", Op: OpSparseDense, Input: sp.Name, Weight: "wide.w", Bias: "wide.b", Activation: ActReLU},
			{Name: "joined", Op: OpConcat, Inputs: []string{code, "listener_features", "wide", "show_features"}},
			{Name: "hidden", Op: OpDense, Input: "joined", Weight: "h.w", Bias: "h.b", Activation: ActReLU},
			{Name: "p", Op: OpDense, Input: "hidden", Weight: "out.w", Bias: "out.b", Activation: ActSigmoid},
		}
	}
	sc.spec.Layers = scorerLayers(EncoderPrefix + "code")
	sc.spec.Output = "p"
	sc.spec.Encoder = ref
	tc.scorer = sc

	em := newModel(KindScorer, "promo-scorer-frozen", sp)
	em.spec.Inputs.Dense = sc.spec.Inputs.Dense
	for _, t := range enc.spec.Tensors {
		if t.Part == "encoder" { // the decoder is not needed to score
			em.tensor(t.Name, "encoder", t.Shape, enc.w[t.Name])
		}
	}
	for _, t := range sc.spec.Tensors {
		em.tensor(t.Name, t.Part, t.Shape, sc.w[t.Name])
	}
	for _, l := range enc.spec.Layers {
		if l.Name == "dec_h" || l.Name == "recon" {
			continue
		}
		em.layer(l)
	}
	em.spec.Layers = append(em.spec.Layers, scorerLayers("code")...)
	em.spec.Output = "p"
	emRef := *ref
	emRef.Embedded = true
	em.spec.Encoder = &emRef
	em.spec.Training = sc.spec.Training
	tc.embedded = em

	tc.batch = randomBatch(rng, sp, o.rows)
	return tc
}

// randomBatch makes rows with 0..12 pairs: row 0 and every 7th row are
// empty; ids mostly from a small hot set so repeats are common.
func randomBatch(rng *rand.Rand, sp SparseInput, rows int) *Batch {
	hot := []int32{0, 1, 2, int32(sp.VocabularySize - 1)}
	unk := int32(-1)
	if sp.Unknown == UnknownBucket {
		unk = int32(sp.VocabularySize)
	}
	out := make([][]pair, rows)
	for r := range out {
		if r%7 == 0 {
			continue
		}
		n := 1 + rng.IntN(12)
		seen := map[int32]bool{}
		for len(out[r]) < n {
			var i int32
			switch u := rng.Float64(); {
			case u < 0.15 && unk >= 0:
				i = unk
			case u < 0.5:
				i = hot[rng.IntN(len(hot))]
			default:
				i = int32(rng.IntN(sp.VocabularySize))
			}
			if sp.Duplicates == DuplicatesRefuse && i != unk && seen[i] {
				continue
			}
			seen[i] = true
			var v float32
			switch u := rng.Float64(); {
			case u < 0.1:
				v = 0
			case u < 0.4:
				v = float32(rng.Float64() * 3) // fractional
			default:
				v = float32(1 + rng.IntN(200)) // a play count
			}
			out[r] = append(out[r], pair{i, v})
		}
	}
	dense := map[string][]float32{
		"listener_features": make([]float32, rows*5),
		"show_features":     make([]float32, rows*3),
	}
	for _, m := range dense {
		for i := range m {
			m[i] = float32(rng.NormFloat64())
		}
	}
	return batchOf(out, dense)
}

// standardCases covers every transform, duplicates rule and unknown rule.
func standardCases() []caseOpts {
	return []caseOpts{
		{transform: TransformLog1p, duplicates: DuplicatesSum, unknown: UnknownBucket, vocab: 120, hidden: 24, code: 8, twoLayerEncoder: true, decoderBias: true, rows: 61},
		{transform: TransformIdentity, duplicates: DuplicatesMax, unknown: UnknownBucket, vocab: 57, hidden: 19, code: 6, twoLayerEncoder: false, decoderBias: true, rows: 40},
		{transform: TransformBinary, duplicates: DuplicatesSum, unknown: UnknownDrop, vocab: 300, hidden: 33, code: 7, twoLayerEncoder: true, decoderBias: false, rows: 50},
		{transform: TransformIdentity, duplicates: DuplicatesSum, unknown: UnknownDrop, vocab: 40, hidden: 16, code: 16, twoLayerEncoder: false, decoderBias: false, rows: 35},
		{transform: TransformLog1p, duplicates: DuplicatesMax, unknown: UnknownRefuse, vocab: 200, hidden: 40, code: 9, twoLayerEncoder: true, decoderBias: true, rows: 45},
		{transform: TransformBinary, duplicates: DuplicatesMax, unknown: UnknownBucket, vocab: 80, hidden: 20, code: 5, twoLayerEncoder: true, decoderBias: true, rows: 44},
		{transform: TransformLog1p, duplicates: DuplicatesRefuse, unknown: UnknownBucket, vocab: 90, hidden: 17, code: 4, twoLayerEncoder: true, decoderBias: true, rows: 47},
	}
}
