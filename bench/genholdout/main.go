// Command genholdout writes a large synthetic holdout for a model
// directory's inputs (benchmarks only: invented rows, not a scenario):
//
//	go run ./bench/genholdout -model DIR -rows 2000000 -out holdout.parquet
//
// Items are drawn Zipf-like from the model's vocabulary (plus ids it does
// not know), nonzeros per row geometric with mean ~4.5 (capped at 40),
// values 1..200, dense features uniform in [0, 1), labels Bernoulli(0.12).
package main

import (
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"os"

	"modelgate/internal/data"
	"modelgate/internal/model/modeldir"
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
	zipf := rand.NewZipf(rand.New(rand.NewPCG(seed, 3)), 1.1, 1, uint64(len(vocab)+len(vocab)/10-1))
	batch := make([]data.HoldoutRow, 0, 4096)
	for i := 0; i < rows; i++ {
		n := int(math.Min(40, math.Floor(math.Log(1-r.Float64())/math.Log(1-1/4.5))))
		row := data.HoldoutRow{RowID: int64(i), Dense: map[string][]float32{}, Weight: 1}
		for j := 0; j < n; j++ {
			k := int(zipf.Uint64())
			id := fmt.Sprintf("unknown-%d", k)
			if k < len(vocab) {
				id = vocab[k]
			}
			row.Items = append(row.Items, id)
			row.Values = append(row.Values, float32(1+r.IntN(200)))
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
