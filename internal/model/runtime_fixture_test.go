package model_test

import (
	"math"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// TestRuntimeMatchesFixtureProbes runs the repository's tiny encoder and
// scorer (testdata/models, written by the fixture generator) on their probe
// rows and compares with the outputs recorded there, which the generator
// computed with its own float64 forward pass.
func TestRuntimeMatchesFixtureProbes(t *testing.T) {
	root := filepath.Join("..", "..", "testdata", "models")
	enc, err := modeldir.Read(filepath.Join(root, "tiny-encoder"))
	if err != nil {
		t.Fatal(err)
	}
	sc, err := modeldir.Read(filepath.Join(root, "tiny-scorer"))
	if err != nil {
		t.Fatal(err)
	}
	encNet, err := model.Compile(enc.Model.Spec, enc.Model.Tensors, nil)
	if err != nil {
		t.Fatal(err)
	}
	scNet, err := model.Compile(sc.Model.Spec, sc.Model.Tensors, &model.Encoder{Spec: enc.Model.Spec, Weights: enc.Model.Tensors})
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		net *model.Net
		m   *modeldir.Model
	}{{encNet, enc.Model}, {scNet, sc.Model}} {
		sp := c.m.Spec.Inputs.Sparse[0]
		index := map[string]int32{}
		for i, id := range c.m.Vocabulary {
			index[id] = int32(i)
		}
		// One batch of all probe rows; unknown ids go to the bucket.
		b := &model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}
		for _, p := range c.m.Probes {
			for i, id := range p.Items {
				k, ok := index[id]
				if !ok {
					if sp.Unknown != model.UnknownBucket {
						t.Fatalf("probe has unknown id %q and the rule is %s", id, sp.Unknown)
					}
					k = int32(sp.VocabularySize)
				}
				b.Indices = append(b.Indices, k)
				b.Values = append(b.Values, p.Values[i])
			}
			b.Indptr = append(b.Indptr, int32(len(b.Indices)))
			for _, d := range c.m.Spec.Inputs.Dense {
				b.Dense[d.Name] = append(b.Dense[d.Name], p.Dense[d.Name]...)
			}
		}
		r := c.net.NewRunner(2)
		checked := 0
		for layer := range c.m.Probes[0].Expect {
			w := c.net.Width(layer)
			got, err := r.Run(b, layer, nil)
			if err != nil {
				t.Fatalf("%s %s: %v", c.m.Spec.Name, layer, err)
			}
			for i, p := range c.m.Probes {
				want := p.Expect[layer]
				if len(want) != w {
					t.Fatalf("%s probe %d %s: %d values, width %d", c.m.Spec.Name, i, layer, len(want), w)
				}
				for j, v := range want {
					g := got[i*w+j]
					if math.Abs(float64(g-v)) > 1e-5*max(1, math.Abs(float64(v))) {
						t.Errorf("%s probe %d %s[%d] = %v, recorded %v", c.m.Spec.Name, i, layer, j, g, v)
					}
					checked++
				}
			}
		}
		r.Close()
		if checked == 0 {
			t.Errorf("%s: no probe outputs checked", c.m.Spec.Name)
		}
	}
}
