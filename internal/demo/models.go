package demo

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"fmt"
	"math"

	"github.com/modelgate/modelgate/internal/fit"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// File names inside the model directories Build writes.
const (
	vocabFile   = "vocabulary.txt"
	statsFile   = "stats.json"
	probesFile  = "probes.jsonl"
	encoderFile = "encoder.safetensors"
	decoderFile = "decoder.safetensors"
	headFile    = "head.safetensors"
	trainFile   = "training.safetensors"
)

// Tensor and layer names.
const (
	tEncW   = "enc.w"
	tEncB   = "enc.b"
	tDecB   = "dec.b"
	tHeadW  = "head.w"
	tHeadB  = "head.b"
	tAdamM  = "enc.w.adam_m"
	lCode   = "code"
	lRecon  = "reconstruction"
	lConcat = "features"
	lHidden = "hidden"
	lP      = "p"
	tHidW   = "hidden.w"
	tHidB   = "hidden.b"
)

// sourceRepository is the fictional network's training code repository.
const sourceRepository = "https://example.invalid/podcast-network/listener-models"

func sparseInput(vocabSize int) model.SparseInput {
	return model.SparseInput{
		Name: InputSparse, VocabularySize: vocabSize, Unknown: model.UnknownBucket,
		Transform: model.TransformLog1p, Duplicates: model.DuplicatesSum, Vocabulary: vocabFile,
	}
}

// denseInputs are every dense input a scorer may use, in holdout column order.
var denseInputs = []model.DenseInput{
	{Name: InputListener, Size: 2, Describes: model.DescribesUser},
	{Name: InputShow, Size: 2 + len(Categories), Describes: model.DescribesItem},
	{Name: InputAffinity, Size: 1, Describes: model.DescribesItem},
}

func denseInput(name string) model.DenseInput {
	for _, d := range denseInputs {
		if d.Name == name {
			return d
		}
	}
	panic("demo: unknown dense input " + name)
}

// commitOf makes a stable fictional source commit for a model.
func commitOf(name string) string {
	h := sha256.Sum256([]byte("podcast-network training code for " + name))
	return hex.EncodeToString(h[:20])
}

// datasetDigest is the sha256 of a canonical binary rendering of the
// listeners a model was trained on: its lineage's trainingData.
func datasetDigest(d *Data, sets ...[]Listener) string {
	h := sha256.New()
	var buf [8]byte
	put := func(x float64) {
		binary.LittleEndian.PutUint64(buf[:], math.Float64bits(x))
		h.Write(buf[:])
	}
	for _, set := range sets {
		for i := range set {
			l := &set[i]
			h.Write([]byte(l.ID))
			put(float64(len(l.Items)))
			for k, j := range l.Items {
				h.Write([]byte(d.Shows[j].ID))
				put(l.Counts[k])
			}
			put(l.TenureDays)
			put(l.SessionsPerWeek)
			put(float64(l.Promo))
			put(l.Label)
		}
	}
	return fmt.Sprintf("sha256:%x", h.Sum(nil))
}

// encoderModel turns a PCA into an encoder model directory: a linear
// autoencoder at its optimum. With W the [V+1, k] weight whose column c is
// component c (row V, the unknown bucket, is zero), code = x·W − μ·W and
// reconstruction = code·Wᵀ + μ (0 at the bucket), x being log1p of the
// episodes played.
func encoderModel(name, description string, p *fit.PCA, vocab []string, stats map[string]any, lin model.Lineage) *modeldir.Model {
	v, k := len(vocab), p.K()
	in := sparseInput(v)
	w := make([]float32, in.Rows()*k)
	for c, comp := range p.Components {
		for r := 0; r < v; r++ {
			w[r*k+c] = float32(comp[r])
		}
	}
	b := make([]float32, k)
	for c := 0; c < k; c++ {
		s := 0.0
		for r := 0; r < v; r++ {
			s += p.Mean[r] * float64(w[r*k+c])
		}
		b[c] = float32(-s)
	}
	dec := make([]float32, in.Rows())
	for r := 0; r < v; r++ {
		dec[r] = float32(p.Mean[r])
	}
	spec := &model.Spec{
		SchemaVersion: 1, Kind: model.KindEncoder, Name: name, Description: description,
		Inputs: model.Inputs{Sparse: []model.SparseInput{in}},
		Tensors: []model.Tensor{
			{Name: tEncW, File: encoderFile, Shape: []int{in.Rows(), k}, DType: "F32", Part: "encoder"},
			{Name: tEncB, File: encoderFile, Shape: []int{k}, DType: "F32", Part: "encoder"},
			{Name: tDecB, File: decoderFile, Shape: []int{in.Rows()}, DType: "F32", Part: "decoder"},
		},
		Layers: []model.Layer{
			{Name: lCode, Op: model.OpSparseDense, Input: in.Name, Weight: tEncW, Bias: tEncB, Activation: model.ActIdentity},
			{Name: lRecon, Op: model.OpTiedDecoder, Input: lCode, TiedTo: tEncW, Bias: tDecB, Activation: model.ActIdentity},
		},
		Code: lCode, Reconstruction: lRecon, Output: lCode,
		Lineage: lin,
		Files:   model.Files{Stats: statsFile, Probes: probesFile},
	}
	return &modeldir.Model{Spec: spec, Vocabulary: vocab, Stats: stats,
		Tensors: map[string][]float32{tEncW: w, tEncB: b, tDecB: dec}}
}

// scorerModel builds a logistic scorer: concat(code, dense inputs…) →
// dense → sigmoid "p". head holds one weight per concatenated feature and
// intercept the bias. With enc non-nil the encoder's tensors and code layer
// are embedded in the scorer; otherwise the scorer refers to the encoder by
// ref.
func scorerModel(name, description string, vocab []string, dense []string, head []float32, intercept float32,
	ref model.EncoderRef, embed *modeldir.Model, stats map[string]any, lin model.Lineage) *modeldir.Model {
	in := sparseInput(len(vocab))
	spec := &model.Spec{
		SchemaVersion: 1, Kind: model.KindScorer, Name: name, Description: description,
		Inputs:  model.Inputs{Sparse: []model.SparseInput{in}},
		Output:  lP,
		Encoder: &ref,
		Lineage: lin,
		Files:   model.Files{Stats: statsFile, Probes: probesFile},
	}
	tensors := map[string][]float32{tHeadW: head, tHeadB: {intercept}}
	codeRef := model.EncoderPrefix + ref.Output
	if embed != nil {
		codeRef = lCode
		for _, t := range embed.Spec.Tensors {
			if t.Part != "encoder" {
				continue
			}
			spec.Tensors = append(spec.Tensors, t)
			tensors[t.Name] = embed.Tensors[t.Name]
		}
		for _, l := range embed.Spec.Layers {
			if l.Name == embed.Spec.Code {
				spec.Layers = append(spec.Layers, l)
			}
		}
	}
	concat := []string{codeRef}
	for _, d := range dense {
		spec.Inputs.Dense = append(spec.Inputs.Dense, denseInput(d))
		concat = append(concat, d)
	}
	spec.Tensors = append(spec.Tensors,
		model.Tensor{Name: tHeadW, File: headFile, Shape: []int{len(head), 1}, DType: "F32", Part: "head"},
		model.Tensor{Name: tHeadB, File: headFile, Shape: []int{1}, DType: "F32", Part: "head"},
	)
	spec.Layers = append(spec.Layers,
		model.Layer{Name: lConcat, Op: model.OpConcat, Inputs: concat},
		model.Layer{Name: lP, Op: model.OpDense, Input: lConcat, Weight: tHeadW, Bias: tHeadB, Activation: model.ActSigmoid},
	)
	return &modeldir.Model{Spec: spec, Vocabulary: vocab, Stats: stats, Tensors: tensors}
}

// widenHead re-expresses a scorer's logistic head sigmoid(w·x + c) through a
// hidden ReLU layer of 2k units that computes the same function: unit j < k
// is relu(a_j w·x) and unit k+j is relu(−a_j w·x), with output weights
// ±1/(k a_j), so the output sums relu(a z) − relu(−a z) = a z back to z.
// The scales a_j = 1 + j/k keep the units distinct. The predictions are the
// original's up to float32 rounding; the size and the cost per row are not.
func widenHead(m *modeldir.Model, k int) {
	w, c := m.Tensors[tHeadW], m.Tensors[tHeadB][0]
	in, units := len(w), 2*k
	w1 := make([]float32, in*units)
	w2 := make([]float32, units)
	for j := range k {
		a := 1 + float64(j)/float64(k)
		for i, wi := range w {
			w1[i*units+j] = float32(a * float64(wi))
			w1[i*units+k+j] = float32(-a * float64(wi))
		}
		w2[j] = float32(1 / (float64(k) * a))
		w2[k+j] = -w2[j]
	}
	m.Tensors = map[string][]float32{tHidW: w1, tHidB: make([]float32, units), tHeadW: w2, tHeadB: {c}}
	for i := range m.Spec.Tensors {
		if m.Spec.Tensors[i].Name == tHeadW {
			m.Spec.Tensors[i].Shape = []int{units, 1}
		}
	}
	m.Spec.Tensors = append(m.Spec.Tensors,
		model.Tensor{Name: tHidW, File: headFile, Shape: []int{in, units}, DType: "F32", Part: "head"},
		model.Tensor{Name: tHidB, File: headFile, Shape: []int{units}, DType: "F32", Part: "head"},
	)
	for i := range m.Spec.Layers {
		if m.Spec.Layers[i].Name == lP {
			m.Spec.Layers[i].Input = lHidden
			hidden := model.Layer{Name: lHidden, Op: model.OpDense, Input: lConcat, Weight: tHidW, Bias: tHidB, Activation: model.ActReLU}
			m.Spec.Layers = append(m.Spec.Layers[:i], append([]model.Layer{hidden}, m.Spec.Layers[i:]...)...)
			break
		}
	}
}

// nonzeroStats summarises the nonzeros per row of a training set: the
// quantiles (numpy's default, Hyndman & Fan type 7) the gate weights
// reconstruction losses by, the mean and the maximum.
func nonzeroStats(sets ...[]Listener) map[string]any {
	var nnz []float64
	for _, set := range sets {
		for i := range set {
			nnz = append(nnz, float64(len(set[i].Items)))
		}
	}
	q := fit.Quantiles(nnz, []float64{0.5, 0.9, 0.99, 0.999})
	mean, mx := 0.0, 0.0
	for _, x := range nnz {
		mean += x
		mx = math.Max(mx, x)
	}
	return map[string]any{
		"mean": mean / float64(len(nnz)), "q50": q[0], "q90": q[1], "q99": q[2], "q999": q[3], "max": mx,
		"quantileMethod": "linear interpolation (Hyndman and Fan type 7, numpy's default)",
	}
}
