package data

import (
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/cputime"
	"github.com/modelgate/modelgate/internal/demo/listening"
	"github.com/modelgate/modelgate/internal/model"
)

// benchmarkRead reads a generated holdout of rows rows (up to 30 items
// each, one dense input of size 4) in batches of 1024 and reports rows/s.
func benchmarkRead(b *testing.B, ext string, rows int, rowPath bool) {
	v := testVocab(b, model.UnknownBucket, episodeIDs(32768)...)
	path := filepath.Join(b.TempDir(), "holdout"+ext)
	writeBig(b, path, rows, 32768, 30, denseAffinity)
	opts := Options{Spec: testSpec(v, denseAffinity), Vocab: v, rowPath: rowPath}
	readBench(b, path, opts, rows, 1024)
}

// readBench reads the holdout at path in batches of batch rows, b.N times.
// Besides rows/s by wall time it reports the file's megabytes per second
// of CPU time: cpu-MB/s by the reading thread's time, proc-cpu-MB/s by the
// whole process's (which also counts the garbage collector's work on
// other threads).
func readBench(b *testing.B, path string, opts Options, rows, batch int) {
	st, err := os.Stat(path)
	if err != nil {
		b.Fatal(err)
	}
	var f Frame
	b.ReportAllocs()
	b.ResetTimer()
	proc0 := cputime.Process()
	stop := cputime.Thread()
	for b.Loop() {
		r, err := Open(path, opts)
		if err != nil {
			b.Fatal(err)
		}
		total := 0
		for {
			n, err := r.Read(&f, batch)
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				b.Fatal(err)
			}
			total += n
		}
		r.Close()
		if total != rows {
			b.Fatalf("read %d rows, want %d", total, rows)
		}
	}
	cpu := stop().Seconds()
	proc := (cputime.Process() - proc0).Seconds()
	b.ReportMetric(float64(rows)*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	// By the thread's CPU time: steadier than wall time on a shared
	// machine (the reader runs on the calling goroutine).
	b.ReportMetric(float64(rows)*float64(b.N)/cpu, "cpu-rows/s")
	b.ReportMetric(float64(st.Size())*float64(b.N)/cpu/1e6, "cpu-MB/s")
	b.ReportMetric(float64(st.Size())*float64(b.N)/proc/1e6, "proc-cpu-MB/s")
}

// BenchmarkReadParquetListening reads a holdout shaped like the one
// bench/genholdout writes for the demo scorer (the gate benchmark's
// input): show ids and plays from the demo's listening model over a
// 1,101-id vocabulary plus a tenth more unknown ids, dense inputs of sizes
// 2, 8 and 1, labels, slices and row ids; 500,000 rows in batches of 4096
// (the gate's batch size).
func BenchmarkReadParquetListening(b *testing.B) {
	const rows, vocabN = 500_000, 1101
	ids := make([]string, vocabN)
	for i := range ids {
		ids[i] = fmt.Sprintf("show-%05d", i+1)
	}
	v := testVocab(b, model.UnknownBucket, ids...)
	dense := []model.DenseInput{
		{Name: "listener", Size: 2, Describes: model.DescribesUser},
		{Name: "show", Size: 8, Describes: model.DescribesItem},
		{Name: "category_affinity", Size: 1, Describes: model.DescribesItem},
	}
	path := filepath.Join(b.TempDir(), "holdout.parquet")
	w, err := CreateHoldout(path, HoldoutLayout{Dense: dense, Slices: true})
	if err != nil {
		b.Fatal(err)
	}
	r, lr := rand.New(rand.NewPCG(1, 2)), rand.New(rand.NewPCG(1, 3))
	lm := listening.Default()
	const chunk = 4096
	for start := 0; start < rows; start += chunk {
		n := min(chunk, rows-start)
		indptr, indices, plays := lm.Rows(lr, n, vocabN+vocabN/10)
		batch := make([]HoldoutRow, n)
		for i := range batch {
			row := HoldoutRow{RowID: int64(start + i), Dense: map[string][]float32{}, Weight: 1}
			for p := indptr[i]; p < indptr[i+1]; p++ {
				id := fmt.Sprintf("unknown-%d", indices[p])
				if int(indices[p]) < vocabN {
					id = ids[indices[p]]
				}
				row.Items = append(row.Items, id)
				row.Values = append(row.Values, plays[p])
			}
			for _, in := range dense {
				d := make([]float32, in.Size)
				for j := range d {
					d[j] = r.Float32()
				}
				row.Dense[in.Name] = d
			}
			if r.Float64() < 0.12 {
				row.Label = 1
			}
			row.Slice = []string{"new", "regular", "heavy"}[(start+i)%3]
			batch[i] = row
		}
		if err := w.Write(batch...); err != nil {
			b.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		b.Fatal(err)
	}
	readBench(b, path, Options{Spec: testSpec(v, dense...), Vocab: v}, rows, 4096)
}

func BenchmarkReadParquet1M(b *testing.B) { benchmarkRead(b, ".parquet", 1_000_000, false) }

// BenchmarkReadParquet1MRowPath reads the same file value by value.
func BenchmarkReadParquet1MRowPath(b *testing.B) { benchmarkRead(b, ".parquet", 1_000_000, true) }
func BenchmarkReadJSONL100k(b *testing.B)        { benchmarkRead(b, ".jsonl", 100_000, false) }
