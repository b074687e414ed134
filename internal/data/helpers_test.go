package data

import (
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

// Demo-flavoured fixtures: listeners of a fictional podcast network, the
// episodes they played (items), and whether they subscribed to a promoted
// show (label).

var (
	denseAge      = model.DenseInput{Name: "listener_age", Size: 1, Describes: model.DescribesUser}
	denseAffinity = model.DenseInput{Name: "show_affinity", Size: 4, Describes: model.DescribesUser}
)

// episodeIDs returns n vocabulary ids: string ids and, every third one, an
// integer id in canonical decimal form.
func episodeIDs(n int) []string {
	ids := make([]string, n)
	for i := range ids {
		if i%3 == 2 {
			ids[i] = fmt.Sprint(100000 + i)
		} else {
			ids[i] = fmt.Sprintf("ep-%d", i)
		}
	}
	return ids
}

func testVocab(t testing.TB, unknown string, ids ...string) *Vocabulary {
	t.Helper()
	in := model.SparseInput{
		Name: "episodes", VocabularySize: len(ids), Unknown: unknown,
		Transform: model.TransformLog1p, Duplicates: model.DuplicatesSum, Vocabulary: "vocab.txt",
	}
	v, err := ParseVocabulary(strings.NewReader(strings.Join(ids, "\n")), in)
	if err != nil {
		t.Fatalf("ParseVocabulary: %v", err)
	}
	return v
}

func testSpec(v *Vocabulary, dense ...model.DenseInput) *model.Spec {
	return &model.Spec{
		SchemaVersion: 1, Kind: model.KindScorer, Name: "promo-scorer",
		Inputs: model.Inputs{Sparse: []model.SparseInput{v.Input()}, Dense: dense},
	}
}

// genRows makes n deterministic holdout rows. Some ids are unknown to a
// vocabulary of episodeIDs(vocabN).
func genRows(seed uint64, n, vocabN, maxItems int, dense ...model.DenseInput) []HoldoutRow {
	rng := rand.New(rand.NewPCG(seed, 7))
	ids := episodeIDs(vocabN)
	slices := []string{"new-listener", "returning", ""}
	rows := make([]HoldoutRow, n)
	for r := range rows {
		k := rng.IntN(maxItems + 1)
		row := HoldoutRow{
			RowID:  int64(1000 + r*3),
			Items:  make([]string, k),
			Values: make([]float32, k),
			Label:  float32(rng.IntN(2)),
			Weight: float32(rng.IntN(4)) * 0.5,
			Slice:  slices[rng.IntN(len(slices))],
		}
		for i := range k {
			if rng.IntN(10) == 0 {
				row.Items[i] = fmt.Sprintf("ep-unknown-%d", rng.IntN(50))
			} else {
				row.Items[i] = ids[rng.IntN(len(ids))]
			}
			row.Values[i] = float32(1 + rng.IntN(20))
		}
		if len(dense) > 0 {
			row.Dense = map[string][]float32{}
			for _, d := range dense {
				v := make([]float32, d.Size)
				for j := range v {
					v[j] = float32(rng.NormFloat64())
				}
				row.Dense[d.Name] = v
			}
		}
		rows[r] = row
	}
	return rows
}

// writeHoldout writes rows to path with the layout, failing the test on error.
func writeHoldout(t testing.TB, path string, layout HoldoutLayout, rows []HoldoutRow) {
	t.Helper()
	w, err := CreateHoldout(path, layout)
	if err != nil {
		t.Fatalf("CreateHoldout: %v", err)
	}
	if err := w.Write(rows...); err != nil {
		t.Fatalf("Write: %v", err)
	}
	if err := w.Close(); err != nil {
		t.Fatalf("Close: %v", err)
	}
}

// flat is a whole file's frames concatenated, for comparison.
type flat struct {
	Indptr  []int32
	Indices []int32
	Values  []float32
	Dense   map[string][]float32
	Labels  []float32
	Weights []float32
	Slices  []string
	RowIDs  []int64
}

func (fl *flat) add(f *Frame) {
	base := int32(len(fl.Indices))
	if len(fl.Indptr) == 0 {
		fl.Indptr = []int32{0}
	}
	for _, p := range f.Indptr[1:] {
		fl.Indptr = append(fl.Indptr, base+p)
	}
	fl.Indices = append(fl.Indices, f.Indices...)
	fl.Values = append(fl.Values, f.Values...)
	for k, v := range f.Dense {
		if fl.Dense == nil {
			fl.Dense = map[string][]float32{}
		}
		fl.Dense[k] = append(fl.Dense[k], v...)
	}
	fl.Labels = append(fl.Labels, f.Labels...)
	fl.Weights = append(fl.Weights, f.Weights...)
	fl.Slices = append(fl.Slices, f.Slices...)
	fl.RowIDs = append(fl.RowIDs, f.RowIDs...)
}

// readAll reads a whole file in batches of batch rows.
func readAll(t testing.TB, path string, opts Options, batch int) (*flat, bool) {
	t.Helper()
	r, err := Open(path, opts)
	if err != nil {
		t.Fatalf("Open: %v", err)
	}
	defer r.Close()
	var (
		f         Frame
		fl        flat
		hasLabels bool
	)
	for {
		n, err := r.Read(&f, batch)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatalf("Read: %v", err)
		}
		if n != f.Rows() || n > batch {
			t.Fatalf("Read returned %d rows, frame has %d, batch %d", n, f.Rows(), batch)
		}
		hasLabels = f.HasLabels
		fl.add(&f)
	}
	return &fl, hasLabels
}

// expected computes what a reader must produce for rows under v's unknown
// rule (bucket or drop) and the given layout.
func expected(t testing.TB, v *Vocabulary, rows []HoldoutRow, layout HoldoutLayout) *flat {
	t.Helper()
	fl := &flat{Indptr: []int32{0}}
	for _, r := range rows {
		for i, id := range r.Items {
			ix, ok := v.Lookup(id)
			switch {
			case ok:
			case v.Input().Unknown == model.UnknownBucket:
				ix = int32(v.Len())
			case v.Input().Unknown == model.UnknownDrop:
				continue
			default:
				t.Fatalf("expected: unknown id %q under rule %q", id, v.Input().Unknown)
			}
			fl.Indices = append(fl.Indices, ix)
			fl.Values = append(fl.Values, r.Values[i])
		}
		fl.Indptr = append(fl.Indptr, int32(len(fl.Indices)))
		for _, d := range layout.Dense {
			if fl.Dense == nil {
				fl.Dense = map[string][]float32{}
			}
			fl.Dense[d.Name] = append(fl.Dense[d.Name], r.Dense[d.Name]...)
		}
		if !layout.NoLabels {
			fl.Labels = append(fl.Labels, r.Label)
		}
		w := float32(1)
		if layout.Weights {
			w = r.Weight
		}
		fl.Weights = append(fl.Weights, w)
		s := ""
		if layout.Slices {
			s = r.Slice
		}
		fl.Slices = append(fl.Slices, s)
		fl.RowIDs = append(fl.RowIDs, r.RowID)
	}
	return fl
}

// rowErr checks that err is a BadInput RowError for the given row whose
// message names the file and contains want.
func rowErr(t *testing.T, err error, file string, row int64, want string) {
	t.Helper()
	if err == nil {
		t.Fatalf("no error, want row %d: %q", row, want)
	}
	var re *RowError
	if !errors.As(err, &re) {
		t.Fatalf("error %v is not a RowError", err)
	}
	if !errkind.Is(err, errkind.BadInput) {
		t.Errorf("error %v is of kind %v, want bad input", err, errkind.Of(err))
	}
	msg := err.Error()
	if re.Row != row || !strings.Contains(msg, fmt.Sprintf("row %d:", row)) {
		t.Errorf("error %q: row %d, want row %d", msg, re.Row, row)
	}
	if !strings.Contains(msg, file) {
		t.Errorf("error %q does not name the file %q", msg, file)
	}
	if !strings.Contains(msg, want) {
		t.Errorf("error %q does not contain %q", msg, want)
	}
}
