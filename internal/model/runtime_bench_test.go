package model

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/demo/listening"
	"github.com/modelgate/modelgate/internal/model/kernel"
)

// The runtime benchmark's workload, a podcast network at production scale
// invented for the benchmark: a batch of 16,384 listeners over a catalogue
// of 32,768 shows (plus the unknown-id bucket), each row drawn from the demo
// generator's listening model (package listening: shows followed, Zipf-like
// popularity with exponent 1.05, episodes played 1..300 through log1p, a
// few anomalous listeners touching hundreds of shows), 16 listener features;
// an encoder 32,768 → 768 relu → 128 relu (the code) and a scorer
// concat(code, features) 144 → 48 relu → 1 sigmoid.
const (
	benchRows     = 16384
	benchShows    = 32768
	benchHidden   = 768
	benchCode     = 128
	benchFeatures = 16
	benchHead     = 48
)

type benchWorkload struct {
	encoder, scorer *modelBuilder
	batch           *Batch
}

// benchWeightRows is the sparse layer's weight rows: every show plus the
// unknown bucket.
const benchWeightRows = benchShows + 1

func newBenchWorkload() *benchWorkload {
	rng := rand.New(rand.NewPCG(2026, 15))
	sp := SparseInput{Name: "episodes_played", VocabularySize: benchShows, Unknown: UnknownBucket,
		Transform: TransformLog1p, Duplicates: DuplicatesSum, Vocabulary: "shows.txt"}
	enc := newModel(KindEncoder, "listener-encoder", sp).
		randTensor(rng, "w1", "encoder", benchWeightRows, benchHidden).randTensor(rng, "b1", "encoder", benchHidden).
		randTensor(rng, "w2", "encoder", benchHidden, benchCode).randTensor(rng, "b2", "encoder", benchCode).
		layer(Layer{Name: "h1", Op: OpSparseDense, Input: sp.Name, Weight: "w1", Bias: "b1", Activation: ActReLU}).
		layer(Layer{Name: "code", Op: OpDense, Input: "h1", Weight: "w2", Bias: "b2", Activation: ActReLU})
	enc.spec.Code, enc.spec.Output = "code", "code"
	sc := newModel(KindScorer, "promo-scorer", sp).dense("listener_features", benchFeatures).
		randTensor(rng, "w3", "head", benchCode+benchFeatures, benchHead).randTensor(rng, "b3", "head", benchHead).
		randTensor(rng, "w4", "head", benchHead, 1).randTensor(rng, "b4", "head", 1).
		layer(Layer{Name: "joined", Op: OpConcat, Inputs: []string{"encoder/code", "listener_features"}}).
		layer(Layer{Name: "h", Op: OpDense, Input: "joined", Weight: "w3", Bias: "b3", Activation: ActReLU}).
		layer(Layer{Name: "p", Op: OpDense, Input: "h", Weight: "w4", Bias: "b4", Activation: ActSigmoid})
	sc.spec.Output = "p"
	sc.spec.Encoder = &EncoderRef{Digest: "sha256:" + strings.Repeat("0", 64), Output: "code"}

	indptr, indices, plays := listening.Default().Rows(rng, benchRows, benchShows)
	b := &Batch{Indptr: indptr, Indices: indices, Values: plays, Dense: map[string][]float32{}}
	feats := make([]float32, benchRows*benchFeatures)
	for i := range feats {
		feats[i] = float32(rng.NormFloat64())
	}
	b.Dense["listener_features"] = feats
	return &benchWorkload{encoder: enc, scorer: sc, batch: b}
}

// dump writes the workload for bench/runtime_numpy.py: raw little-endian
// arrays and a JSON index of their shapes, plus the Go output p.
func (wl *benchWorkload) dump(b *testing.B, dir string, p []float32) {
	meta := map[string]any{"rows": benchRows, "shows": benchShows, "weightRows": benchWeightRows, "nnz": len(wl.batch.Indices)}
	files := map[string][]int{}
	put := func(name string, data any, shape ...int) {
		writeRaw(b, filepath.Join(dir, name), data)
		files[name] = shape
	}
	put("indptr.i32", wl.batch.Indptr, benchRows+1)
	put("indices.i32", wl.batch.Indices, len(wl.batch.Indices))
	put("values.f32", wl.batch.Values, len(wl.batch.Values))
	put("features.f32", wl.batch.Dense["listener_features"], benchRows, benchFeatures)
	for _, m := range []*modelBuilder{wl.encoder, wl.scorer} {
		for _, t := range m.spec.Tensors {
			put(t.Name+".f32", m.w[t.Name], t.Shape...)
		}
	}
	put("p_go.f32", p, benchRows)
	meta["files"] = files
	js, _ := json.MarshalIndent(meta, "", " ")
	if err := os.WriteFile(filepath.Join(dir, "workload.json"), js, 0o644); err != nil {
		b.Fatal(err)
	}
}

// BenchmarkForward runs the scorer (with its encoder) over the whole
// workload on GOMAXPROCS threads (use -cpu 1,2). Set MODELGATE_BENCH_DUMP to
// a directory to also write the workload there for the numpy comparison.
func BenchmarkForward(b *testing.B) {
	wl := newBenchWorkload()
	net, err := Compile(wl.scorer.spec, wl.scorer.w, &Encoder{Spec: wl.encoder.spec, Weights: wl.encoder.w})
	if err != nil {
		b.Fatal(err)
	}
	r := net.NewRunner(runtime.GOMAXPROCS(0))
	defer r.Close()
	p, err := r.Run(wl.batch, "p", nil)
	if err != nil {
		b.Fatal(err)
	}
	if dir := os.Getenv("MODELGATE_BENCH_DUMP"); dir != "" && runtime.GOMAXPROCS(0) == 1 {
		wl.dump(b, dir, p)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for b.Loop() {
		if p, err = r.Run(wl.batch, "p", p); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(benchRows)*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	anomalous := 0
	for r := 0; r < benchRows; r++ {
		if int(wl.batch.Indptr[r+1]-wl.batch.Indptr[r]) > listening.Default().MaxFollowed {
			anomalous++
		}
	}
	b.Logf("kernel path %s, tile %d rows; %d rows, %.2f nonzeros per row, %d anomalous rows",
		kernel.Features(), DefaultTileRows, benchRows, float64(len(wl.batch.Indices))/benchRows, anomalous)
}

// BenchmarkForwardDensified is the baseline the sparse path avoids: each
// chunk of rows is exploded to a dense row as wide as the sparse layer's
// weight (every show plus the unknown bucket; duplicates summed, log1p) and
// the first layer is a dense product over all of it; the rest of the model
// is the same. It runs the first 512 rows only: the first layer's work
// per row grows from 2·768 FLOP per nonzero to 2·768 per weight row, about
// 50 MFLOP, some 230 times the whole sparse-path forward pass.
func BenchmarkForwardDensified(b *testing.B) {
	const rows, chunk = 512, 128
	wl := newBenchWorkload()
	sp := wl.encoder.spec.Inputs.Sparse[0]
	m := newModel(KindEncoder, "densified", sp).dense("activity", benchWeightRows)
	for _, src := range []*modelBuilder{wl.encoder, wl.scorer} {
		for _, t := range src.spec.Tensors {
			m.tensor(t.Name, "encoder", t.Shape, src.w[t.Name])
		}
	}
	m.dense("listener_features", benchFeatures).
		layer(Layer{Name: "h1", Op: OpDense, Input: "activity", Weight: "w1", Bias: "b1", Activation: ActReLU}).
		layer(Layer{Name: "code", Op: OpDense, Input: "h1", Weight: "w2", Bias: "b2", Activation: ActReLU}).
		layer(Layer{Name: "joined", Op: OpConcat, Inputs: []string{"code", "listener_features"}}).
		layer(Layer{Name: "h", Op: OpDense, Input: "joined", Weight: "w3", Bias: "b3", Activation: ActReLU}).
		layer(Layer{Name: "p", Op: OpDense, Input: "h", Weight: "w4", Bias: "b4", Activation: ActSigmoid})
	m.spec.Code, m.spec.Output = "code", "p"
	net, err := Compile(m.spec, m.w, nil)
	if err != nil {
		b.Fatal(err)
	}
	r := net.NewRunner(runtime.GOMAXPROCS(0))
	defer r.Close()
	src := wl.batch
	const width = benchWeightRows
	act := make([]float32, chunk*width)
	empty := &Batch{Indptr: make([]int32, chunk+1), Dense: map[string][]float32{}}
	out := make([]float32, rows)
	b.ResetTimer()
	for b.Loop() {
		for r0 := 0; r0 < rows; r0 += chunk {
			n := min(chunk, rows-r0)
			clear(act[:n*width])
			for i := 0; i < n; i++ {
				row := act[i*width : (i+1)*width]
				for p := src.Indptr[r0+i]; p < src.Indptr[r0+i+1]; p++ {
					row[src.Indices[p]] += src.Values[p]
				}
				for p := src.Indptr[r0+i]; p < src.Indptr[r0+i+1]; p++ {
					if v := row[src.Indices[p]]; v > 0 {
						row[src.Indices[p]] = -float32(math.Log1p(float64(v))) // marked done
					}
				}
				for p := src.Indptr[r0+i]; p < src.Indptr[r0+i+1]; p++ {
					row[src.Indices[p]] = float32(math.Abs(float64(row[src.Indices[p]])))
				}
			}
			empty.Indptr = empty.Indptr[:n+1]
			empty.Dense["activity"] = act[:n*width]
			empty.Dense["listener_features"] = src.Dense["listener_features"][r0*benchFeatures : (r0+n)*benchFeatures]
			if _, err := r.Run(empty, "p", out[r0:r0+n]); err != nil {
				b.Fatal(err)
			}
		}
	}
	b.ReportMetric(float64(rows)*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
}
