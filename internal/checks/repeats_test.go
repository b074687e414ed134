package checks

import (
	"encoding/binary"
	"hash/fnv"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"testing"

	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/model"
)

// frameOf builds a frame from rows of (item, value) pairs and one dense
// input of width dw (all rows share it; nil when dw is 0).
func frameOf(rows [][][2]float32, dense [][]float32) *data.Frame {
	f := &data.Frame{Batch: model.Batch{Indptr: []int32{0}}}
	for _, r := range rows {
		for _, p := range r {
			f.Indices = append(f.Indices, int32(p[0]))
			f.Values = append(f.Values, p[1])
		}
		f.Indptr = append(f.Indptr, int32(len(f.Indices)))
	}
	if dense != nil {
		f.Dense = map[string][]float32{}
		for _, d := range dense {
			f.Dense["features"] = append(f.Dense["features"], d...)
		}
	}
	return f
}

// TestRepeatsIgnoreShortRows: independent listeners with one play of one
// of 50 shows match each other by chance all the time (5,000 rows over 50
// values: by the pigeonhole principle at least 4,950 rows repeat an
// earlier one), so rows that short are not counted; rows with three or
// more values that repeat exactly are.
func TestRepeatsIgnoreShortRows(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 11))
	var short [][][2]float32
	for range 5000 {
		short = append(short, [][2]float32{{float32(rng.IntN(50)), 1}})
	}
	r := newRepeats(int64(len(short)), false)
	if err := r.add(frameOf(short, nil), len(short)); err != nil {
		t.Fatal(err)
	}
	if f, ok := r.finding(); ok {
		t.Errorf("one-item rows drawn independently: %+v, want no repeats finding", f)
	}

	// 100 distinct three-item rows, each present twice: 100 repeats.
	var long [][][2]float32
	for i := range 100 {
		row := [][2]float32{{float32(3 * i), 1}, {float32(3*i + 1), 2}, {float32(3*i + 2), 0.5}}
		long = append(long, row, row)
	}
	long = append(long, short[:300]...) // short rows, many equal: not counted
	r = newRepeats(int64(len(long)), false)
	if err := r.add(frameOf(long, nil), len(long)); err != nil {
		t.Fatal(err)
	}
	f, ok := r.finding()
	if !ok || f.Value == nil || *f.Value != 100 {
		t.Errorf("100 three-item rows repeated once each among short rows: %+v (found %v), want 100", f, ok)
	}

	// Two items plus one dense value make three values: counted.
	rows := [][][2]float32{{{1, 1}, {2, 1}}, {{1, 1}, {2, 1}}, {{1, 1}, {2, 1}}}
	dense := [][]float32{{0.25}, {0.25}, {0.75}}
	r = newRepeats(3, false)
	if err := r.add(frameOf(rows, dense), 3); err != nil {
		t.Fatal(err)
	}
	if f, ok := r.finding(); !ok || *f.Value != 1 {
		t.Errorf("two items and a dense value, one exact repeat: %+v (found %v), want 1", f, ok)
	}
}

// TestRepeatsHashIsFNV1a: the row hash is FNV-1a 64 (Fowler, Noll, Vo;
// the reference is Go's hash/fnv) over each value's 8 little-endian bytes:
// the count of items, each (item, value bits) pair, then the dense values
// in name order. Shard results keep these hashes, so they must not change.
func TestRepeatsHashIsFNV1a(t *testing.T) {
	rows := [][][2]float32{{{5, 1.5}, {9, 2}, {11, 0.25}}, {{1, 1}, {2, 3}}}
	dense := [][]float32{{0.5}, {-2}}
	f := frameOf(rows, dense)
	r := newRepeats(2, false)
	if err := r.add(f, 2); err != nil {
		t.Fatal(err)
	}
	var want []uint64
	for i, row := range rows {
		h := fnv.New64a()
		put := func(v uint64) {
			var b [8]byte
			binary.LittleEndian.PutUint64(b[:], v)
			h.Write(b[:])
		}
		put(uint64(len(row)))
		for _, p := range row {
			put(uint64(uint32(int32(p[0])))<<32 | uint64(math.Float32bits(p[1])))
		}
		for _, v := range dense[i] {
			put(uint64(math.Float32bits(v)))
		}
		want = append(want, h.Sum64())
	}
	if !slices.Equal(r.Hashes, want) {
		t.Errorf("row hashes %x, want hash/fnv's %x", r.Hashes, want)
	}
}

// addRepeatsRef is repeats.add as it was before rows were hashed four at
// a time: one row after another, byte by byte.
func addRepeatsRef(r *repeats, f *data.Frame, n int) {
	names := make([]string, 0, len(f.Dense))
	for k := range f.Dense {
		names = append(names, k)
	}
	slices.Sort(names)
	const offset64, prime64 = 14695981039346656037, 1099511628211
	var h uint64
	put := func(v uint64) {
		for k := 0; k < 64; k += 8 {
			h ^= (v >> k) & 0xff
			h *= prime64
		}
	}
	width := 0
	for _, k := range names {
		width += len(f.Dense[k]) / n
	}
	for i := 0; i < n; i++ {
		lo, hi := f.Indptr[i], f.Indptr[i+1]
		if int(hi-lo)+width < repeatMinContent {
			continue
		}
		h = offset64
		put(uint64(hi - lo))
		for p := lo; p < hi; p++ {
			put(uint64(uint32(f.Indices[p]))<<32 | uint64(math.Float32bits(f.Values[p])))
		}
		for _, k := range names {
			col := f.Dense[k]
			size := len(col) / n
			for _, v := range col[i*size : (i+1)*size] {
				put(uint64(math.Float32bits(v)))
			}
		}
		if x := h; r.Shift == 0 || x>>(64-r.Shift) == 0 {
			r.Hashes = append(r.Hashes, x)
		}
	}
}

// randomFrame returns n rows of 0 to maxItems items (a few rows far
// longer) and the given dense widths.
func randomFrame(rng *rand.Rand, n, maxItems int, widths map[string]int) *data.Frame {
	f := &data.Frame{Batch: model.Batch{Indptr: []int32{0}, Dense: map[string][]float32{}}}
	for i := 0; i < n; i++ {
		items := rng.IntN(maxItems + 1)
		if rng.IntN(50) == 0 {
			items = 10 * maxItems
		}
		for range items {
			f.Indices = append(f.Indices, int32(rng.IntN(40000)))
			f.Values = append(f.Values, float32(1+rng.IntN(300)))
		}
		f.Indptr = append(f.Indptr, int32(len(f.Indices)))
		for k, w := range widths {
			for range w {
				f.Dense[k] = append(f.Dense[k], float32(rng.NormFloat64()))
			}
		}
	}
	return f
}

// TestRepeatsAddMatchesReference: the hashes kept, in order, equal those
// of the one-row-at-a-time code bit for bit, over random batches of 0 to
// 2,000 rows (short rows skipped among them), with and without dense
// inputs, with and without sampling, several batches into one repeats.
func TestRepeatsAddMatchesReference(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 5))
	for _, shift := range []uint{0, 2} {
		for _, widths := range []map[string]int{nil, {"features": 3}, {"b": 2, "a": 1}} {
			got, want := &repeats{Shift: shift}, &repeats{Shift: shift}
			for _, n := range []int{1, 2, 3, 4, 5, 9, 100, 2000} {
				f := randomFrame(rng, n, 12, widths)
				if err := got.add(f, n); err != nil {
					t.Fatal(err)
				}
				addRepeatsRef(want, f, n)
			}
			if len(want.Hashes) < 100 || !slices.Equal(got.Hashes, want.Hashes) {
				t.Fatalf("shift %d, dense %v: %d hashes, want the reference's %d, equal and in order", shift, widths, len(got.Hashes), len(want.Hashes))
			}
		}
	}
}

// BenchmarkRepeatsAdd: hashing a batch of 4,096 rows of about 7 items and
// 4 dense values, by the reference (one row at a time) and by add, in one
// run (CPU time of the benchmark's thread: the machine is shared).
func BenchmarkRepeatsAdd(b *testing.B) {
	const n = 4096
	f := randomFrame(rand.New(rand.NewPCG(1, 2)), n, 13, map[string]int{"features": 4})
	for _, c := range []struct {
		name string
		add  func(r *repeats)
	}{
		{"reference", func(r *repeats) { addRepeatsRef(r, f, n) }},
		{"add", func(r *repeats) { _ = r.add(f, n) }},
	} {
		b.Run(c.name, func(b *testing.B) {
			r := &repeats{}
			runtime.LockOSThread()
			defer runtime.UnlockOSThread()
			cpu := threadCPU()
			for b.Loop() {
				r.Hashes = r.Hashes[:0]
				c.add(r)
			}
			b.ReportMetric(float64(threadCPU()-cpu)/float64(b.N*n), "cpu-ns/row")
		})
	}
}
