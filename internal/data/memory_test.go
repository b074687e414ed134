package data

import (
	"errors"
	"io"
	"os"
	"path/filepath"
	"testing"

	"github.com/modelgate/modelgate/internal/model"
)

// writeBig writes n generated rows in chunks, so the test never holds them
// all; every 100th row has exactly maxItems items.
func writeBig(t testing.TB, path string, n, vocabN, maxItems int, dense ...model.DenseInput) {
	t.Helper()
	w, err := CreateHoldout(path, HoldoutLayout{Dense: dense, Weights: true, Slices: true})
	if err != nil {
		t.Fatal(err)
	}
	const chunk = 10000
	for start := 0; start < n; start += chunk {
		rows := genRows(uint64(start), min(chunk, n-start), vocabN, maxItems, dense...)
		for i := range rows {
			rows[i].RowID = int64(start + i)
			if i%100 == 0 {
				for len(rows[i].Items) < maxItems {
					rows[i].Items = append(rows[i].Items, "ep-1")
					rows[i].Values = append(rows[i].Values, 1)
				}
			}
		}
		if err := w.Write(rows...); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
}

// maxReadAt records the largest single read.
type maxReadAt struct {
	r   io.ReaderAt
	max int
}

func (m *maxReadAt) ReadAt(p []byte, off int64) (int, error) {
	m.max = max(m.max, len(p))
	return m.r.ReadAt(p, off)
}

func TestParquetBoundedMemory(t *testing.T) {
	const (
		rows     = 200_000
		maxItems = 40
		batch    = 1000
	)
	v := testVocab(t, model.UnknownBucket, episodeIDs(5000)...)
	path := filepath.Join(t.TempDir(), "big.parquet")
	writeBig(t, path, rows, 5000, maxItems, denseAffinity)
	if g := len(openParquetFile(t, path).RowGroups()); g < 3 {
		t.Fatalf("%d row groups; the test wants several", g)
	}

	file, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer file.Close()
	st, _ := file.Stat()
	ra := &maxReadAt{r: file}
	r, err := OpenReader(ra, st.Size(), FormatParquet, Options{Spec: testSpec(v, denseAffinity), Vocab: v, Name: "big.parquet"})
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	if r.Rows() != rows {
		t.Errorf("Rows() = %d, want %d", r.Rows(), rows)
	}
	pr := r.(*parquetReader)
	var (
		f     Frame
		total int
		next  int64
	)
	for {
		n, err := r.Read(&f, batch)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		total += n
		// Rows come in file order.
		if f.RowIDs[0] != next || f.RowIDs[n-1] != next+int64(n)-1 {
			t.Fatalf("row ids %d..%d, want from %d", f.RowIDs[0], f.RowIDs[n-1], next)
		}
		next += int64(n)
		// The frame's memory is bounded by the batch, not the file: at
		// most twice what one batch of the longest rows needs (append
		// growth).
		if c := cap(f.Indices); c > 2*batch*maxItems {
			t.Fatalf("cap(Indices) = %d after %d rows", c, total)
		}
		if c := cap(f.Values); c > 2*batch*maxItems {
			t.Fatalf("cap(Values) = %d after %d rows", c, total)
		}
		if c := cap(f.Indptr); c > 2*(batch+1) {
			t.Fatalf("cap(Indptr) = %d after %d rows", c, total)
		}
		if c := cap(f.Dense[denseAffinity.Name]); c > 2*batch*denseAffinity.Size {
			t.Fatalf("cap(Dense) = %d after %d rows", c, total)
		}
		for _, s := range [][]float32{f.Labels, f.Weights} {
			if cap(s) > 2*batch {
				t.Fatalf("cap of a per-row slice = %d", cap(s))
			}
		}
		if cap(f.RowIDs) > 2*batch || cap(f.Slices) > 2*batch {
			t.Fatalf("cap(RowIDs) = %d, cap(Slices) = %d", cap(f.RowIDs), cap(f.Slices))
		}
		// The column cursors hold a fixed value buffer and at most one
		// row spanning a refill.
		for _, c := range pr.cols {
			if len(c.buf) != 1024 || cap(c.row) > 2*(1024+maxItems) {
				t.Fatalf("column %s: buffer %d, row scratch %d", c.name, len(c.buf), cap(c.row))
			}
		}
	}
	if total != rows {
		t.Errorf("read %d rows, want %d", total, rows)
	}
	// No read of the whole file, or of anything near it.
	if ra.max > int(st.Size()/8) {
		t.Errorf("largest read %d bytes of a %d-byte file", ra.max, st.Size())
	}
	t.Logf("file %d bytes, largest read %d bytes", st.Size(), ra.max)
}

// TestReadAllocations checks that reading reuses the frame: in steady
// state the reader allocates per page, not per row. (A count, not a
// timing.)
func TestReadAllocations(t *testing.T) {
	v := testVocab(t, model.UnknownBucket, episodeIDs(2000)...)
	opts := Options{Spec: testSpec(v, denseAge), Vocab: v}
	dir := t.TempDir()
	const rows = 50_000
	for _, ext := range []string{".parquet", ".jsonl"} {
		path := filepath.Join(dir, "a"+ext)
		writeBig(t, path, rows, 2000, 30, denseAge)
		var f Frame
		readFile := func() {
			r, err := Open(path, opts)
			if err != nil {
				t.Fatal(err)
			}
			defer r.Close()
			for {
				if _, err := r.Read(&f, 512); err != nil {
					if !errors.Is(err, io.EOF) {
						t.Fatal(err)
					}
					return
				}
			}
		}
		readFile() // warm the frame up
		perRow := testing.AllocsPerRun(2, readFile) / rows
		t.Logf("%s: %.4f allocations per row", ext, perRow)
		if perRow > 0.05 {
			t.Errorf("%s: %.4f allocations per row, want under 0.05", ext, perRow)
		}
	}
}
