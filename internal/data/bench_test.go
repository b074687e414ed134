package data

import (
	"errors"
	"io"
	"os"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/model"
)

// benchmarkRead reads a generated holdout of rows rows (up to 30 items
// each, one dense input of size 4) in batches of 1024 and reports rows/s.
func benchmarkRead(b *testing.B, ext string, rows int, rowPath bool) {
	v := testVocab(b, model.UnknownBucket, episodeIDs(32768)...)
	path := filepath.Join(b.TempDir(), "holdout"+ext)
	writeBig(b, path, rows, 32768, 30, denseAffinity)
	opts := Options{Spec: testSpec(v, denseAffinity), Vocab: v, rowPath: rowPath}
	st, err := os.Stat(path)
	if err != nil {
		b.Fatal(err)
	}
	var f Frame
	b.ReportAllocs()
	b.ResetTimer()
	stop := threadCPU()
	for b.Loop() {
		r, err := Open(path, opts)
		if err != nil {
			b.Fatal(err)
		}
		total := 0
		for {
			n, err := r.Read(&f, 1024)
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
	b.ReportMetric(float64(rows)*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	// By the thread's CPU time: steadier than wall time on a shared
	// machine (the reader runs on the calling goroutine).
	b.ReportMetric(float64(rows)*float64(b.N)/cpu, "cpu-rows/s")
	b.ReportMetric(float64(st.Size())*float64(b.N)/cpu/1e6, "cpu-MB/s")
}

func BenchmarkReadParquet1M(b *testing.B) { benchmarkRead(b, ".parquet", 1_000_000, false) }

// BenchmarkReadParquet1MRowPath reads the same file value by value.
func BenchmarkReadParquet1MRowPath(b *testing.B) { benchmarkRead(b, ".parquet", 1_000_000, true) }
func BenchmarkReadJSONL100k(b *testing.B)        { benchmarkRead(b, ".jsonl", 100_000, false) }
