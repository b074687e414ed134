package data

import (
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/google/go-cmp/cmp"
	"github.com/parquet-go/parquet-go"

	"github.com/modelgate/modelgate/internal/model"
)

func TestRoundTrip(t *testing.T) {
	layouts := map[string]HoldoutLayout{
		"full":      {Dense: []model.DenseInput{denseAge, denseAffinity}, Weights: true, Slices: true, RowGroupRows: 64},
		"minimal":   {},
		"no-labels": {NoLabels: true, Dense: []model.DenseInput{denseAffinity}},
	}
	for name, layout := range layouts {
		for _, ext := range []string{".parquet", ".jsonl"} {
			for _, unknown := range []string{model.UnknownBucket, model.UnknownDrop} {
				t.Run(name+ext+"/"+unknown, func(t *testing.T) {
					v := testVocab(t, unknown, episodeIDs(300)...)
					rows := genRows(1, 500, 300, 30, layout.Dense...)
					path := filepath.Join(t.TempDir(), "holdout"+ext)
					writeHoldout(t, path, layout, rows)
					got, hasLabels := readAll(t, path, Options{Spec: testSpec(v, layout.Dense...), Vocab: v}, 37)
					want := expected(t, v, rows, layout)
					if diff := cmp.Diff(want, got); diff != "" {
						t.Errorf("read back differs (-want +got):\n%s", diff)
					}
					if hasLabels == layout.NoLabels {
						t.Errorf("HasLabels = %v with NoLabels %v", hasLabels, layout.NoLabels)
					}
				})
			}
		}
	}
}

// writeGeneric writes rows with parquet-go's reflection-based generic
// writer and a plain struct schema: a different code path from
// HoldoutWriter's hand-built rows, with small pages and row groups so that
// the reader crosses page and row-group boundaries.
func writeGeneric[T any](t testing.TB, path string, rows []T) {
	t.Helper()
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	w := parquet.NewGenericWriter[T](f, parquet.PageBufferSize(512), parquet.MaxRowsPerRowGroup(7))
	if _, err := w.Write(rows); err != nil {
		t.Fatal(err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
}

// independentRow uses other physical types and shapes than HoldoutWriter:
// int64 ids, double values, a scalar double for a size-1 dense input, a
// bare repeated float (no LIST annotation), a boolean label, an optional
// weight, no row_id, and a column the reader must ignore.
type independentRow struct {
	Items    []int64   `parquet:"items,list"`
	Values   []float64 `parquet:"values,list"`
	Age      float64   `parquet:"listener_age"`
	Affinity []float32 `parquet:"show_affinity"`
	Label    bool      `parquet:"label"`
	Weight   *float64  `parquet:"weight,optional"`
	Slice    string    `parquet:"slice"`
	Index    int64     `parquet:"__index_level_0__"`
}

func TestParquetIndependentWriter(t *testing.T) {
	ids := []string{"ep-0", "42", "7", "-3", "100000"}
	v := testVocab(t, model.UnknownBucket, ids...)
	rng := rand.New(rand.NewPCG(3, 4))
	known := []int64{42, 7, -3, 100000}
	var rows []independentRow
	want := flat{Indptr: []int32{0}, Dense: map[string][]float32{}}
	for r := range 60 {
		row := independentRow{Age: float64(r) / 10, Label: r%3 == 0, Slice: fmt.Sprint("s", r%2), Index: int64(r)}
		for range rng.IntN(6) {
			id := known[rng.IntN(len(known))]
			if rng.IntN(5) == 0 {
				id = 555 // unknown: bucket row 5
			}
			val := float64(rng.IntN(9)) + 0.25
			row.Items = append(row.Items, id)
			row.Values = append(row.Values, val)
			ix, ok := v.Lookup(strconv.FormatInt(id, 10))
			if !ok {
				ix = 5
			}
			want.Indices = append(want.Indices, ix)
			want.Values = append(want.Values, float32(val))
		}
		want.Indptr = append(want.Indptr, int32(len(want.Indices)))
		row.Affinity = []float32{float32(r), 1, 2, 3}
		want.Dense["show_affinity"] = append(want.Dense["show_affinity"], row.Affinity...)
		want.Dense["listener_age"] = append(want.Dense["listener_age"], float32(row.Age))
		if row.Label {
			want.Labels = append(want.Labels, 1)
		} else {
			want.Labels = append(want.Labels, 0)
		}
		wt := float32(1) // null weight: the default
		if r%4 != 0 {
			w := float64(r % 5)
			row.Weight = &w
			wt = float32(w)
		}
		want.Weights = append(want.Weights, wt)
		want.Slices = append(want.Slices, row.Slice)
		want.RowIDs = append(want.RowIDs, int64(r)) // no row_id column: the row number
		rows = append(rows, row)
	}
	path := filepath.Join(t.TempDir(), "independent.parquet")
	writeGeneric(t, path, rows)
	pf := openParquetFile(t, path)
	if g := len(pf.RowGroups()); g < 2 {
		t.Fatalf("the file has %d row groups; the test wants several", g)
	}
	if c := pf.Root().Column("show_affinity"); !c.Repeated() || !c.Leaf() {
		t.Fatalf("show_affinity is not a bare repeated column: %v", c)
	}
	if c := pf.Root().Column("items"); c.Leaf() {
		t.Fatalf("items is not a LIST group: %v", c)
	}
	opts := Options{Spec: testSpec(v, denseAge, denseAffinity), Vocab: v, RequireLabels: true}
	got, hasLabels := readAll(t, path, opts, 8)
	if diff := cmp.Diff(&want, got); diff != "" {
		t.Errorf("read back differs (-want +got):\n%s", diff)
	}
	if !hasLabels {
		t.Errorf("HasLabels false")
	}
	r, err := Open(path, opts)
	if err != nil {
		t.Fatal(err)
	}
	defer r.Close()
	if r.Rows() != 60 {
		t.Errorf("Rows() = %d, want 60", r.Rows())
	}
}

// TestParquetListDecodingArrowFile reads list_columns.parquet from the
// Apache parquet-testing data that parquet-go ships in its module, a file
// written by Arrow's C++ Parquet writer (parquet-cpp 1.5.1) with optional
// three-level lists and optional elements. Its documented content
// (apache/parquet-testing, data/README.md):
//
//	int64_list: [1, 2, 3], [null, 1], [4]
//	utf8_list:  ["abc", "efg", "hij"], null, ["efg", null, "hij", "xyz"]
func TestParquetListDecodingArrowFile(t *testing.T) {
	out, err := exec.Command("go", "list", "-m", "-f", "{{.Dir}}", "github.com/parquet-go/parquet-go").Output()
	path := filepath.Join(strings.TrimSpace(string(out)), "testdata", "list_columns.parquet")
	if _, serr := os.Stat(path); err != nil || serr != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("parquet-go's testdata not found (%v, %v)", err, serr)
		}
		t.Skipf("parquet-go's testdata not found (%v, %v)", err, serr)
	}
	pf := openParquetFile(t, path)
	decode := func(name string, kinds kindSet) []string {
		c, err := newColumn(name, pf.Root().Column(name), shapeList, kinds)
		if err != nil {
			t.Fatal(err)
		}
		c.open(pf.RowGroups()[0].ColumnChunks()[c.index])
		defer c.close()
		var rows []string
		for range pf.NumRows() {
			vals, err := c.next()
			if err != nil {
				t.Fatal(err)
			}
			n := c.listLen(vals)
			if n < 0 {
				rows = append(rows, "null")
				continue
			}
			var elems []string
			for _, v := range vals[:n] {
				if v.DefinitionLevel() < c.maxDef {
					elems = append(elems, "null")
				} else {
					elems = append(elems, v.String())
				}
			}
			rows = append(rows, "["+strings.Join(elems, ", ")+"]")
		}
		if err := c.endChunk(); err != nil {
			t.Error(err)
		}
		return rows
	}
	if diff := cmp.Diff([]string{"[1, 2, 3]", "[null, 1]", "[4]"}, decode("int64_list", idKinds)); diff != "" {
		t.Errorf("int64_list (-want +got):\n%s", diff)
	}
	if diff := cmp.Diff([]string{"[abc, efg, hij]", "null", "[efg, null, hij, xyz]"}, decode("utf8_list", idKinds)); diff != "" {
		t.Errorf("utf8_list (-want +got):\n%s", diff)
	}
}

func TestJSONLMixedIDs(t *testing.T) {
	v := testVocab(t, model.UnknownBucket, "ep-1", "42", "007", "-3")
	text := strings.Join([]string{
		`{"items":["ep-1",42,"42",-3,"-3",7,"007",-0,"x"],"values":[1,2,3,4,5,6,7,8,9],"label":true,"slice":"new","extra":{"a":[1,{"b":null}]}}`,
		`{"values":[],"items":[],"label":0.0,"row_id":-12,"weight":0}`,
		`  {"items":["\u0065p-1", 42],"values":[1.5e0, 2E1],"label":1}  `,
	}, "\n") + "\n"
	path := filepath.Join(t.TempDir(), "mixed.JSONL")
	if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	got, hasLabels := readAll(t, path, Options{Spec: testSpec(v), Vocab: v}, 2)
	want := &flat{
		Indptr: []int32{0, 9, 9, 11},
		// 42 and "42" are one id; 7 is not "007"; -0 is 0, unknown.
		Indices: []int32{0, 1, 1, 3, 3, 4, 2, 4, 4, 0, 1},
		Values:  []float32{1, 2, 3, 4, 5, 6, 7, 8, 9, 1.5, 20},
		Labels:  []float32{1, 0, 1},
		Weights: []float32{1, 0, 1},
		Slices:  []string{"new", "", ""},
		RowIDs:  []int64{0, -12, 2},
	}
	if diff := cmp.Diff(want, got); diff != "" {
		t.Errorf("(-want +got):\n%s", diff)
	}
	if !hasLabels {
		t.Error("HasLabels false")
	}
}

func openParquetFile(t testing.TB, path string) *parquet.File {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { f.Close() })
	st, err := f.Stat()
	if err != nil {
		t.Fatal(err)
	}
	pf, err := parquet.OpenFile(f, st.Size())
	if err != nil {
		t.Fatal(err)
	}
	return pf
}
