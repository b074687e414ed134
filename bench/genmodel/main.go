// Command genmodel writes a large synthetic encoder model directory whose
// one tensor file is about -mib MiB (benchmarks only: random weights, not
// a scenario), for timing push, pull, verify, show and score on a model
// far larger than the demo's:
//
//	go run ./bench/genmodel -mib 200 -out DIR
//
// The encoder maps a vocabulary of shows through one sparse × dense layer
// of width 256 (random normal weights, fixed seed).
package main

import (
	"flag"
	"fmt"
	"math/rand/v2"
	"os"

	"modelgate/internal/model"
	"modelgate/internal/model/modeldir"
)

func main() {
	mib := flag.Int("mib", 200, "size of the tensor file in MiB")
	out := flag.String("out", "", "model directory to write")
	seed := flag.Uint64("seed", 1, "seed")
	flag.Parse()
	if *out == "" || *mib < 1 {
		flag.Usage()
		os.Exit(2)
	}
	if err := run(*mib, *out, *seed); err != nil {
		fmt.Fprintln(os.Stderr, "genmodel:", err)
		os.Exit(1)
	}
}

func run(mib int, out string, seed uint64) error {
	const width = 256
	rows := mib << 20 / 4 / width
	ids := make([]string, rows-1) // the last row is the unknown-id bucket
	for i := range ids {
		ids[i] = fmt.Sprintf("show-%07d", i)
	}
	r := rand.New(rand.NewPCG(seed, 2))
	w := make([]float32, rows*width)
	for i := range w {
		w[i] = float32(r.NormFloat64()) / 16
	}
	in := model.SparseInput{Name: "episodes_played", VocabularySize: len(ids), Unknown: model.UnknownBucket,
		Transform: model.TransformLog1p, Duplicates: model.DuplicatesSum, Vocabulary: "vocabulary.txt"}
	m := &modeldir.Model{
		Spec: &model.Spec{SchemaVersion: 1, Kind: model.KindEncoder, Name: "bench-encoder",
			Description: "benchmark encoder: random weights",
			Inputs:      model.Inputs{Sparse: []model.SparseInput{in}},
			Tensors:     []model.Tensor{{Name: "w", File: "encoder.safetensors", Shape: []int{rows, width}, DType: "F32", Part: "encoder"}},
			Layers:      []model.Layer{{Name: "code", Op: model.OpSparseDense, Input: in.Name, Weight: "w", Activation: model.ActIdentity}},
			Code:        "code", Output: "code"},
		Tensors:    map[string][]float32{"w": w},
		Vocabulary: ids,
	}
	return modeldir.Write(out, m)
}
