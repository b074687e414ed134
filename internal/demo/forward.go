package demo

import (
	"fmt"
	"math"
	"sort"

	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// net64 is the training side's forward pass: a plain float64 interpreter of
// a model directory's spec over its stored (float32) weights, written here
// independently of the gate's runtime. Probe rows' expected outputs and the
// holdout figures in the Scenario come from it.
type net64 struct {
	sparse  model.SparseInput
	vocab   map[string]int
	layers  map[string]model.Layer // by full name ("encoder/code" for a referenced encoder's layer)
	tensors map[string][]float64
	shapes  map[string][]int
	dense   map[string]int
}

// newNet64 prepares m for evaluation; enc is the encoder a scorer refers to
// by digest (nil otherwise). Ids are mapped through m's own vocabulary, as
// the gate would map a holdout's ids for m.
func newNet64(m *modeldir.Model, enc *modeldir.Model) (*net64, error) {
	n := &net64{
		sparse: m.Spec.Inputs.Sparse[0], vocab: map[string]int{},
		layers: map[string]model.Layer{}, tensors: map[string][]float64{}, shapes: map[string][]int{},
		dense: map[string]int{},
	}
	for i, id := range m.Vocabulary {
		n.vocab[id] = i
	}
	for _, d := range m.Spec.Inputs.Dense {
		n.dense[d.Name] = d.Size
	}
	add := func(mm *modeldir.Model, prefix string) error {
		for _, t := range mm.Spec.Tensors {
			v, ok := mm.Tensors[t.Name]
			if !ok {
				return fmt.Errorf("tensor %q has no values", t.Name)
			}
			f := make([]float64, len(v))
			for i, x := range v {
				f[i] = float64(x)
			}
			n.tensors[prefix+t.Name] = f
			n.shapes[prefix+t.Name] = t.Shape
		}
		inputs := map[string]bool{mm.Spec.Inputs.Sparse[0].Name: true}
		for _, d := range mm.Spec.Inputs.Dense {
			inputs[d.Name] = true
		}
		ref := func(s string) string {
			if s == "" || inputs[s] {
				return s
			}
			return prefix + s
		}
		for _, l := range mm.Spec.Layers {
			c := l
			c.Name = prefix + l.Name
			c.Input = ref(l.Input)
			c.Inputs = nil
			for _, in := range l.Inputs {
				c.Inputs = append(c.Inputs, ref(in))
			}
			for _, p := range []*string{&c.Weight, &c.TiedTo, &c.Bias} {
				if *p != "" {
					*p = prefix + *p
				}
			}
			n.layers[c.Name] = c
		}
		return nil
	}
	if enc != nil {
		if err := add(enc, model.EncoderPrefix); err != nil {
			return nil, err
		}
	}
	if err := add(m, ""); err != nil {
		return nil, err
	}
	return n, nil
}

// pair is one merged, transformed entry of a sparse row.
type pair struct {
	row int
	v   float64
}

// canonical maps a row's ids through the vocabulary (unknown ids to the
// bucket), sums duplicates and applies log1p, in float64.
func (n *net64) canonical(items []string, values []float32) ([]pair, error) {
	if n.sparse.Unknown != model.UnknownBucket || n.sparse.Duplicates != model.DuplicatesSum || n.sparse.Transform != model.TransformLog1p {
		return nil, fmt.Errorf("demo forward pass supports only bucket/sum/log1p sparse inputs")
	}
	sums := map[int]float64{}
	for i, id := range items {
		k, ok := n.vocab[id]
		if !ok {
			k = n.sparse.VocabularySize
		}
		sums[k] += float64(values[i])
	}
	out := make([]pair, 0, len(sums))
	for k, v := range sums {
		out = append(out, pair{k, math.Log1p(v)})
	}
	sort.Slice(out, func(a, b int) bool { return out[a].row < out[b].row })
	return out, nil
}

// eval computes the named layers (and what they depend on) for one row.
func (n *net64) eval(items []string, values []float32, dense map[string][]float32, want ...string) (map[string][]float64, error) {
	x, err := n.canonical(items, values)
	if err != nil {
		return nil, err
	}
	vals := map[string][]float64{}
	for name, size := range n.dense {
		v, ok := dense[name]
		if !ok || len(v) != size {
			return nil, fmt.Errorf("dense input %q: %d values, want %d", name, len(v), size)
		}
		f := make([]float64, size)
		for i, e := range v {
			f[i] = float64(e)
		}
		vals[name] = f
	}
	var get func(name string) ([]float64, error)
	get = func(name string) ([]float64, error) {
		if v, ok := vals[name]; ok {
			return v, nil
		}
		l, ok := n.layers[name]
		if !ok {
			return nil, fmt.Errorf("no layer or input %q", name)
		}
		var out []float64
		switch l.Op {
		case model.OpSparseDense:
			w, shape := n.tensors[l.Weight], n.shapes[l.Weight]
			out = make([]float64, shape[1])
			for _, p := range x {
				row := w[p.row*shape[1] : (p.row+1)*shape[1]]
				for j := range out {
					out[j] += p.v * row[j]
				}
			}
		case model.OpDense:
			in, err := get(l.Input)
			if err != nil {
				return nil, err
			}
			w, shape := n.tensors[l.Weight], n.shapes[l.Weight]
			if len(in) != shape[0] {
				return nil, fmt.Errorf("layer %q: input width %d, weight %v", name, len(in), shape)
			}
			out = make([]float64, shape[1])
			for i, xi := range in {
				row := w[i*shape[1] : (i+1)*shape[1]]
				for j := range out {
					out[j] += xi * row[j]
				}
			}
		case model.OpTiedDecoder:
			in, err := get(l.Input)
			if err != nil {
				return nil, err
			}
			w, shape := n.tensors[l.TiedTo], n.shapes[l.TiedTo]
			out = make([]float64, shape[0])
			for r := range out {
				row := w[r*shape[1] : (r+1)*shape[1]]
				s := 0.0
				for j, h := range in {
					s += h * row[j]
				}
				out[r] = s
			}
		case model.OpConcat:
			for _, in := range l.Inputs {
				v, err := get(in)
				if err != nil {
					return nil, err
				}
				out = append(out, v...)
			}
		default:
			return nil, fmt.Errorf("layer %q: op %q not supported", name, l.Op)
		}
		if l.Bias != "" {
			for j, b := range n.tensors[l.Bias] {
				out[j] += b
			}
		}
		for j, v := range out {
			switch l.Activation {
			case model.ActReLU:
				out[j] = math.Max(v, 0)
			case model.ActSigmoid:
				out[j] = sigmoid(v)
			case model.ActTanh:
				out[j] = math.Tanh(v)
			}
		}
		vals[name] = out
		return out, nil
	}
	res := map[string][]float64{}
	for _, w := range want {
		v, err := get(w)
		if err != nil {
			return nil, err
		}
		res[w] = v
	}
	return res, nil
}

func sigmoid(v float64) float64 {
	if v >= 0 {
		return 1 / (1 + math.Exp(-v))
	}
	e := math.Exp(v)
	return e / (1 + e)
}

func to32(v []float64) []float32 {
	out := make([]float32, len(v))
	for i, x := range v {
		out[i] = float32(x)
	}
	return out
}
