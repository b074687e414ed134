package artifact

import (
	"context"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"

	"modelgate/internal/model"
	"modelgate/internal/model/modeldir"
	"modelgate/internal/registry"
)

// bigModel writes an encoder whose one tensor file is about mb megabytes.
func bigModel(b *testing.B, dir string, mb int) string {
	b.Helper()
	const width = 256
	rows := mb << 20 / 4 / width
	vocab := rows - 1
	ids := make([]string, vocab)
	for i := range ids {
		ids[i] = fmt.Sprintf("show-%07d", i)
	}
	r := rand.New(rand.NewPCG(1, 2))
	w := make([]float32, rows*width)
	for i := range w {
		w[i] = float32(r.NormFloat64())
	}
	in := model.SparseInput{Name: "episodes_played", VocabularySize: vocab, Unknown: model.UnknownBucket,
		Transform: model.TransformLog1p, Duplicates: model.DuplicatesSum, Vocabulary: "vocabulary.txt"}
	m := &modeldir.Model{
		Spec: &model.Spec{SchemaVersion: 1, Kind: model.KindEncoder, Name: "bench-encoder",
			Inputs:  model.Inputs{Sparse: []model.SparseInput{in}},
			Tensors: []model.Tensor{{Name: "w", File: "encoder.safetensors", Shape: []int{rows, width}, DType: "F32", Part: "encoder"}},
			Layers:  []model.Layer{{Name: "code", Op: model.OpSparseDense, Input: in.Name, Weight: "w", Activation: model.ActIdentity}},
			Code:    "code", Output: "code"},
		Tensors:    map[string][]float32{"w": w},
		Vocabulary: ids,
	}
	p := filepath.Join(dir, "model")
	if err := modeldir.Write(p, m); err != nil {
		b.Fatal(err)
	}
	return p
}

func copyFile(src, dst string) error {
	in, err := os.Open(src)
	if err != nil {
		return err
	}
	defer in.Close()
	out, err := os.Create(dst)
	if err != nil {
		return err
	}
	if _, err := io.Copy(out, in); err != nil {
		out.Close()
		return err
	}
	if err := out.Sync(); err != nil {
		out.Close()
		return err
	}
	return out.Close()
}

// BenchmarkPushPull200MB compares push and pull of a model whose tensor
// file is 200 MiB with a plain file copy (+fsync) of the same bytes on the
// same disk. Compare the MB/s columns of the three sub-benchmarks.
func BenchmarkPushPull200MB(b *testing.B) {
	root := b.TempDir()
	dir := bigModel(b, root, 200)
	st, err := os.Stat(filepath.Join(dir, "encoder.safetensors"))
	if err != nil {
		b.Fatal(err)
	}
	size := st.Size()
	ctx := context.Background()
	runs := 0 // every sub-benchmark run writes to fresh names
	b.Run("copy", func(b *testing.B) {
		b.SetBytes(size)
		for i := 0; i < b.N; i++ {
			runs++
			if err := copyFile(filepath.Join(dir, "encoder.safetensors"), filepath.Join(root, fmt.Sprintf("copy-%d", runs))); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("push", func(b *testing.B) {
		b.SetBytes(size)
		for i := 0; i < b.N; i++ {
			runs++
			store, err := registry.OpenLocal(filepath.Join(root, fmt.Sprintf("push-%d", runs)))
			if err != nil {
				b.Fatal(err)
			}
			ref := registry.Ref{Repository: "bench-encoder", Tag: "v1"}
			if _, err := PushModelDir(ctx, store, dir, ref, Options{}); err != nil {
				b.Fatal(err)
			}
		}
	})
	store, err := registry.OpenLocal(filepath.Join(root, "pull-store"))
	if err != nil {
		b.Fatal(err)
	}
	ref := registry.Ref{Repository: "bench-encoder", Tag: "v1"}
	if _, err := PushModelDir(ctx, store, dir, ref, Options{}); err != nil {
		b.Fatal(err)
	}
	b.Run("pull", func(b *testing.B) {
		b.SetBytes(size)
		for i := 0; i < b.N; i++ {
			runs++
			if _, err := Pull(ctx, store, ref, filepath.Join(root, fmt.Sprintf("pulled-%d", runs)), Options{}); err != nil {
				b.Fatal(err)
			}
		}
	})
}
