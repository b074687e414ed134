package model

import (
	"testing"
)

// TestCheckGraphAgreesWithCompile: CheckGraph accepts what Compile accepts
// and refuses, with the same message, what Compile refuses for reasons of
// shape or reference, without any tensor values.
func TestCheckGraphAgreesWithCompile(t *testing.T) {
	spec := &Spec{SchemaVersion: 1, Kind: KindEncoder, Name: "e",
		Inputs: Inputs{Sparse: []SparseInput{{Name: "x", VocabularySize: 3, Unknown: UnknownBucket, Transform: TransformLog1p, Duplicates: DuplicatesSum, Vocabulary: "v"}}},
		Tensors: []Tensor{{Name: "w", File: "e.safetensors", Shape: []int{4, 2}, DType: "F32", Part: "encoder"},
			{Name: "b", File: "e.safetensors", Shape: []int{2}, DType: "F32", Part: "encoder"}},
		Layers: []Layer{{Name: "code", Op: OpSparseDense, Input: "x", Weight: "w", Bias: "b", Activation: ActReLU},
			{Name: "recon", Op: OpTiedDecoder, Input: "code", TiedTo: "w"}},
		Code: "code", Reconstruction: "recon", Output: "code"}
	w := Weights{"w": make([]float32, 8), "b": make([]float32, 2)}
	if err := CheckGraph(spec, nil); err != nil {
		t.Fatalf("CheckGraph refused a valid spec: %v", err)
	}
	if _, err := Compile(spec, w, nil); err != nil {
		t.Fatalf("Compile refused a valid spec: %v", err)
	}
	for name, edit := range map[string]func(s *Spec){
		"bias shape":    func(s *Spec) { s.Tensors[1].Shape = []int{3} },
		"weight rows":   func(s *Spec) { s.Tensors[0].Shape = []int{3, 2} },
		"missing layer": func(s *Spec) { s.Layers[1].Input = "kode" },
		"no code":       func(s *Spec) { s.Code = "" },
	} {
		s := *spec
		s.Tensors = append([]Tensor(nil), spec.Tensors...)
		s.Layers = append([]Layer(nil), spec.Layers...)
		edit(&s)
		w2 := Weights{}
		for _, tn := range s.Tensors {
			n := 1
			for _, d := range tn.Shape {
				n *= d
			}
			w2[tn.Name] = make([]float32, n)
		}
		errC := CheckGraph(&s, nil)
		_, errF := Compile(&s, w2, nil)
		if errC == nil || errF == nil || errC.Error() != errF.Error() {
			t.Errorf("%s: CheckGraph %v, Compile %v", name, errC, errF)
		}
	}
}
