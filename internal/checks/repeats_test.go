package checks

import (
	"math/rand/v2"
	"testing"

	"modelgate/internal/data"
	"modelgate/internal/model"
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
