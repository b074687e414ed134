package model

import (
	"math"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
)

func TestCompileErrors(t *testing.T) {
	// Each case breaks one rule of a valid case and names what the error
	// must say: the layer, the tensor, the shapes.
	const (
		scorer   = "scorer"
		embedded = "embedded"
		encoder  = "encoder"
	)
	layerOf := func(m *modelBuilder, name string) *Layer {
		for i := range m.spec.Layers {
			if m.spec.Layers[i].Name == name {
				return &m.spec.Layers[i]
			}
		}
		t.Fatalf("no layer %q", name)
		return nil
	}
	tensorOf := func(m *modelBuilder, name string) *Tensor {
		for i := range m.spec.Tensors {
			if m.spec.Tensors[i].Name == name {
				return &m.spec.Tensors[i]
			}
		}
		t.Fatalf("no tensor %q", name)
		return nil
	}
	cases := []struct {
		name   string
		target string
		breakf func(tc *testCase) *Encoder // returns the encoder to pass for target scorer
		want   []string
	}{
		{"duplicate layer name", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "hidden").Name = "wide"
			return nil
		}, []string{`layer "wide"`, "used twice"}},
		{"layer name equals an input", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "wide").Name = "show_features"
			return nil
		}, []string{`layer "show_features"`, "used twice"}},
		{"unresolved input", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "hidden").Input = "joint"
			return nil
		}, []string{`layer "hidden"`, `"joint"`, "neither an input nor an earlier layer"}},
		{"reference to a later layer", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "hidden").Input = "p"
			return nil
		}, []string{`layer "hidden"`, `"p"`, "earlier layer"}},
		{"sparse weight misses the unknown bucket", encoder, func(tc *testCase) *Encoder {
			tensorOf(tc.encoder, "enc.w1").Shape = []int{120, 24}
			tc.encoder.w["enc.w1"] = tc.encoder.w["enc.w1"][:120*24]
			return nil
		}, []string{`layer "h1"`, `"enc.w1"`, "[120 24]", "[121, out]", "unknown bucket"}},
		{"dense weight of the wrong input width", scorer, func(tc *testCase) *Encoder {
			tensorOf(tc.scorer, "h.w").Shape = []int{16, 20}
			return nil
		}, []string{`layer "hidden"`, `"h.w"`, "[16 20]", "want [20, out]", `input "joined" has width 20`}},
		{"bias of the wrong width", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "hidden").Bias = "wide.b"
			return nil
		}, []string{`layer "hidden"`, `bias "wide.b"`, "[4]", "want [16]"}},
		{"undeclared tensor", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "p").Weight = "out.weight"
			return nil
		}, []string{`layer "p"`, `"out.weight"`, "not declared"}},
		{"tensor without values", scorer, func(tc *testCase) *Encoder {
			delete(tc.scorer.w, "h.b")
			return nil
		}, []string{`layer "hidden"`, `"h.b"`, "[16]", "no values"}},
		{"tensor with too few values", scorer, func(tc *testCase) *Encoder {
			tc.scorer.w["h.w"] = tc.scorer.w["h.w"][:10]
			return nil
		}, []string{`layer "hidden"`, `"h.w"`, "10 values", "[20 16]", "320"}},
		{"training tensor used", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "p").Weight = "out.w.m"
			return nil
		}, []string{`layer "p"`, `"out.w.m"`, "training"}},
		{"optimizer slot used", scorer, func(tc *testCase) *Encoder {
			tensorOf(tc.scorer, "out.w.m").Part = "head"
			layerOf(tc.scorer, "p").Weight = "out.w.m"
			return nil
		}, []string{`layer "p"`, `"out.w.m"`, "optimizer slot"}},
		{"encoder's optimizer slot used", scorer, func(tc *testCase) *Encoder {
			tc.encoder.spec.Training.OptimizerSlots = []OptimizerSlot{{Tensor: "enc.b1", Of: "enc.w1", Slot: "v"}}
			return nil
		}, []string{`layer "encoder/h1"`, `"encoder/enc.b1"`, "optimizer slot"}},
		{"concat of the sparse input", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "joined").Inputs[2] = "episodes_played"
			return nil
		}, []string{`layer "joined"`, `"episodes_played"`, "sparse input"}},
		{"dense layer on the sparse input", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "hidden").Input = "episodes_played"
			return nil
		}, []string{`layer "hidden"`, "sparse input"}},
		{"sparse_dense on a dense input", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "wide").Input = "show_features"
			return nil
		}, []string{`layer "wide"`, `"show_features" is not the sparse input`}},
		{"tied to a dense weight", encoder, func(tc *testCase) *Encoder {
			layerOf(tc.encoder, "recon").TiedTo = "enc.w2"
			return nil
		}, []string{`layer "recon"`, `"enc.w2"`, "not the weight of an earlier sparse_dense layer"}},
		{"tied decoder input of the wrong width", encoder, func(tc *testCase) *Encoder {
			layerOf(tc.encoder, "recon").Input = "code"
			return nil
		}, []string{`layer "recon"`, `"enc.w1"`, "[121 24]", "want [121, 8]", "width 8"}},
		{"tied decoder bias of the wrong width", encoder, func(tc *testCase) *Encoder {
			layerOf(tc.encoder, "recon").Bias = "enc.b1"
			return nil
		}, []string{`layer "recon"`, `"enc.b1"`, "[24]", "want [121]"}},
		{"missing output layer", scorer, func(tc *testCase) *Encoder {
			tc.scorer.spec.Output = "prob"
			return nil
		}, []string{"output layer", `"prob"`}},
		{"missing code layer", encoder, func(tc *testCase) *Encoder {
			tc.encoder.spec.Code = "codes"
			return nil
		}, []string{"code layer", `"codes"`}},
		{"missing reconstruction layer", encoder, func(tc *testCase) *Encoder {
			tc.encoder.spec.Reconstruction = "decoded"
			return nil
		}, []string{"reconstruction layer", `"decoded"`}},
		{"encoder by reference not given", scorer, func(tc *testCase) *Encoder {
			return &Encoder{}
		}, []string{"no encoder was given"}},
		{"encoder of another transform", scorer, func(tc *testCase) *Encoder {
			tc.encoder.spec.Inputs.Sparse[0].Transform = TransformBinary
			return nil
		}, []string{"sparse input", "transform log1p", "transform binary", "differs"}},
		{"encoder of another vocabulary size", scorer, func(tc *testCase) *Encoder {
			tc.encoder.spec.Inputs.Sparse[0].VocabularySize = 119
			return nil
		}, []string{"vocabularySize 120", "vocabularySize 119"}},
		{"given encoder is a scorer", scorer, func(tc *testCase) *Encoder {
			tc.encoder.spec.Kind = KindScorer
			return nil
		}, []string{`kind "scorer"`}},
		{"encoder output missing", scorer, func(tc *testCase) *Encoder {
			tc.scorer.spec.Encoder.Output = "embedding"
			return nil
		}, []string{"encoder output", `"encoder/embedding"`}},
		{"embedded encoder but one given", embedded, func(tc *testCase) *Encoder {
			return &Encoder{Spec: tc.encoder.spec, Weights: tc.encoder.w}
		}, []string{"embedded", "also given"}},
		{"embedded encoder referred to by prefix", embedded, func(tc *testCase) *Encoder {
			layerOf(tc.embedded, "joined").Inputs[0] = "encoder/code"
			return nil
		}, []string{`layer "joined"`, `"encoder/code"`, "no encoder by reference"}},
		{"embedded encoder output from a head tensor", embedded, func(tc *testCase) *Encoder {
			tensorOf(tc.embedded, "enc.b2").Part = "head"
			return nil
		}, []string{`layer "code"`, `"enc.b2"`, `part "head"`}},
		{"encoder refers to encoder layers", encoder, func(tc *testCase) *Encoder {
			layerOf(tc.encoder, "code").Input = "encoder/h1"
			return nil
		}, []string{`layer "code"`, `"encoder/h1"`}},
		{"non-finite weight", scorer, func(tc *testCase) *Encoder {
			tc.scorer.w["h.w"][7] = float32(math.NaN())
			return nil
		}, []string{`layer "hidden"`, `"h.w"`, "non-finite", "position 7"}},
		{"unknown activation", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "hidden").Activation = "gelu"
			return nil
		}, []string{`layer "hidden"`, `"gelu"`}},
		{"concat with a weight", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "joined").Weight = "h.w"
			return nil
		}, []string{`layer "joined"`, "takes no weight"}},
		{"dropout of an unknown layer", scorer, func(tc *testCase) *Encoder {
			tc.scorer.spec.Training.Dropout = []Dropout{{Layer: "hiden", Rate: 0.2}}
			return nil
		}, []string{"dropout", `"hiden"`}},
		{"a vector used as a weight", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "p").Weight = "out.b"
			return nil
		}, []string{`layer "p"`, `"out.b"`, "[1]", "2 dimensions"}},
		{"every problem reported", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "wide").Weight = "nothing"
			layerOf(tc.scorer, "p").Activation = "softmax"
			tc.scorer.spec.Output = "prob"
			return nil
		}, []string{`layer "wide"`, `"nothing"`, `layer "p"`, `"softmax"`, `"prob"`}},
		{"unknown op", scorer, func(tc *testCase) *Encoder {
			layerOf(tc.scorer, "hidden").Op = "conv"
			return nil
		}, []string{`layer "hidden"`, `op "conv"`}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			tc := randomCase(1, standardCases()[0])
			enc := c.breakf(tc)
			var err error
			switch c.target {
			case scorer:
				if enc == nil {
					enc = &Encoder{Spec: tc.encoder.spec, Weights: tc.encoder.w}
				} else if enc.Spec == nil {
					enc = nil
				}
				_, err = Compile(tc.scorer.spec, tc.scorer.w, enc)
			case embedded:
				_, err = Compile(tc.embedded.spec, tc.embedded.w, enc)
			case encoder:
				_, err = Compile(tc.encoder.spec, tc.encoder.w, enc)
			}
			if err == nil {
				t.Fatal("compiled")
			}
			if !errkind.Is(err, errkind.BadInput) {
				t.Errorf("kind %v, want bad input", errkind.Of(err))
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error does not say %q:\n%v", w, err)
				}
			}
		})
	}
	// The unbroken case compiles in all three forms.
	tc := randomCase(1, standardCases()[0])
	allNets(t, tc)
}
