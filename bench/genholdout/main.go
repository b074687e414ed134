// Command genholdout writes a large synthetic holdout for a model
// directory's inputs (benchmarks only: invented rows, not a scenario):
//
//	go run ./bench/genholdout -model DIR -rows 2000000 -out holdout.parquet
//
// Items and episodes played come from the demo's listening model (package
// listening: shows followed, popularity, plays 1..300, a few anomalous
// listeners) over the model's vocabulary plus a tenth more ids it does not
// know; dense features are uniform in [0, 1), labels Bernoulli(0.12).
package main

import (
	"flag"
	"fmt"
	"math/rand/v2"
	"os"

	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/demo/listening"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

func main() {
	dir := flag.String("model", "", "model directory whose inputs the rows fit")
	rows := flag.Int("rows", 1_000_000, "rows to write")
	out := flag.String("out", "", "output file (.parquet or .jsonl)")
	seed := flag.Uint64("seed", 1, "seed")
	flag.Parse()
	if *dir == "" || *out == "" {
		flag.Usage()
		os.Exit(2)
	}
	if err := run(*dir, *rows, *out, *seed); err != nil {
		fmt.Fprintln(os.Stderr, "genholdout:", err)
		os.Exit(1)
	}
}

func run(dir string, rows int, out string, seed uint64) error {
	d, err := modeldir.Read(dir)
	if err != nil {
		return err
	}
	spec := d.Model.Spec
	vocab := d.Model.Vocabulary
	w, err := data.CreateHoldout(out, data.HoldoutLayout{Dense: spec.Inputs.Dense, Slices: true})
	if err != nil {
		return err
	}
	r := rand.New(rand.NewPCG(seed, 2))
	lr := rand.New(rand.NewPCG(seed, 3))
	lm := listening.Default()
	ids := len(vocab) + len(vocab)/10
	const chunk = 4096
	var indptr, indices []int32
	var plays []float32
	batch := make([]data.HoldoutRow, 0, chunk)
	for i := 0; i < rows; i++ {
		if i%chunk == 0 {
			indptr, indices, plays = lm.Rows(lr, min(chunk, rows-i), ids)
		}
		row := data.HoldoutRow{RowID: int64(i), Dense: map[string][]float32{}, Weight: 1}
		for p := indptr[i%chunk]; p < indptr[i%chunk+1]; p++ {
			k := int(indices[p])
			id := fmt.Sprintf("unknown-%d", k)
			if k < len(vocab) {
				id = vocab[k]
			}
			row.Items = append(row.Items, id)
			row.Values = append(row.Values, plays[p])
		}
		for _, in := range spec.Inputs.Dense {
			v := make([]float32, in.Size)
			for j := range v {
				v[j] = r.Float32()
			}
			row.Dense[in.Name] = v
		}
		if r.Float64() < 0.12 {
			row.Label = 1
		}
		row.Slice = []string{"new", "regular", "heavy"}[i%3]
		batch = append(batch, row)
		if len(batch) == cap(batch) {
			if err := w.Write(batch...); err != nil {
				w.Abort()
				return err
			}
			batch = batch[:0]
		}
	}
	if err := w.Write(batch...); err != nil {
		w.Abort()
		return err
	}
	return w.Close()
}
