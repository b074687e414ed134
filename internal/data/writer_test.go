package data

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"encoding/json"
	"errors"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/google/go-cmp/cmp"
	"github.com/parquet-go/parquet-go"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

// predictions makes n rows of len(cols) numbers, including awkward ones.
func predictions(n, cols int) ([]int64, []float32) {
	ids := make([]int64, n)
	vals := make([]float32, n*cols)
	special := []float32{0, 1, 1e-7, 0.1, 0.33333334, 123456.79, -2.5, math.MaxFloat32, math.SmallestNonzeroFloat32}
	for r := range ids {
		ids[r] = int64(r*7 - 3)
		for c := range cols {
			vals[r*cols+c] = special[(r+c)%len(special)] + float32(r)*1e-3
		}
	}
	return ids, vals
}

func writePredictions(t *testing.T, path string, cols []string, ids []int64, vals []float32) {
	t.Helper()
	w, err := CreatePredictions(path, cols)
	if err != nil {
		t.Fatal(err)
	}
	// Several writes of uneven sizes.
	k := len(cols)
	for start := 0; start < len(ids); {
		end := min(len(ids), start+1+start%1500)
		if err := w.Write(ids[start:end], vals[start*k:end*k]); err != nil {
			t.Fatal(err)
		}
		start = end
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
}

func TestPredictionsParquet(t *testing.T) {
	cols := []string{"c0", "c1", "c2", "c10"} // kept in this order, not sorted
	ids, vals := predictions(300_000, len(cols))
	path := filepath.Join(t.TempDir(), "pred.parquet")
	writePredictions(t, path, cols, ids, vals)

	pf := openParquetFile(t, path)
	var names []string
	for _, f := range pf.Schema().Fields() {
		names = append(names, f.Name())
	}
	if diff := cmp.Diff([]string{"row_id", "c0", "c1", "c2", "c10"}, names); diff != "" {
		t.Errorf("column order (-want +got):\n%s", diff)
	}
	if len(pf.RowGroups()) < 2 {
		t.Errorf("%d row groups for 300,000 rows, want several", len(pf.RowGroups()))
	}
	// Read back with parquet-go's generic reader into a struct.
	type pred struct {
		RowID int64   `parquet:"row_id"`
		C0    float32 `parquet:"c0"`
		C1    float32 `parquet:"c1"`
		C2    float32 `parquet:"c2"`
		C10   float32 `parquet:"c10"`
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	r := parquet.NewGenericReader[pred](f)
	defer r.Close()
	buf := make([]pred, 4096)
	got := 0
	for {
		n, err := r.Read(buf)
		for _, p := range buf[:n] {
			row := []float32{p.C0, p.C1, p.C2, p.C10}
			if p.RowID != ids[got] || !slicesEqualBits(row, vals[got*4:got*4+4]) {
				t.Fatalf("row %d: %+v, want id %d values %v", got, p, ids[got], vals[got*4:got*4+4])
			}
			got++
		}
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
	}
	if got != len(ids) {
		t.Errorf("read %d rows, want %d", got, len(ids))
	}
}

func slicesEqualBits(a, b []float32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
			return false
		}
	}
	return true
}

func TestPredictionsCSV(t *testing.T) {
	cols := []string{"p", `odd,"name"`}
	ids, vals := predictions(5000, len(cols))
	vals[3] = float32(math.NaN())
	vals[4] = float32(math.Inf(-1))
	path := filepath.Join(t.TempDir(), "pred.CSV")
	writePredictions(t, path, cols, ids, vals)
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	// encoding/csv reads RFC 4180.
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if diff := cmp.Diff([]string{"row_id", "p", `odd,"name"`}, recs[0]); diff != "" {
		t.Errorf("header (-want +got):\n%s", diff)
	}
	if len(recs) != len(ids)+1 {
		t.Fatalf("%d records, want %d", len(recs), len(ids)+1)
	}
	for r, rec := range recs[1:] {
		id, err := strconv.ParseInt(rec[0], 10, 64)
		if err != nil || id != ids[r] {
			t.Fatalf("row %d: id %q, want %d", r, rec[0], ids[r])
		}
		for c := range cols {
			v, err := strconv.ParseFloat(rec[1+c], 32)
			want := vals[r*2+c]
			if err != nil || (float32(v) != want && !(want != want && v != v)) {
				t.Fatalf("row %d col %d: %q, want %v", r, c, rec[1+c], want)
			}
		}
	}
}

func TestPredictionsJSONL(t *testing.T) {
	cols := []string{"p", "tab\there"}
	ids, vals := predictions(3000, len(cols))
	vals[5] = float32(math.NaN())
	path := filepath.Join(t.TempDir(), "pred.ndjson")
	writePredictions(t, path, cols, ids, vals)
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	sc := bufio.NewScanner(bytes.NewReader(data))
	r := 0
	for sc.Scan() {
		dec := json.NewDecoder(bytes.NewReader(sc.Bytes()))
		dec.UseNumber()
		var m map[string]any
		if err := dec.Decode(&m); err != nil {
			t.Fatalf("line %d: %v", r+1, err)
		}
		if id, _ := m["row_id"].(json.Number).Int64(); id != ids[r] {
			t.Fatalf("line %d: row_id %v, want %d", r+1, m["row_id"], ids[r])
		}
		for c, name := range cols {
			want := vals[r*2+c]
			if want != want {
				if m[name] != nil {
					t.Fatalf("line %d: NaN written as %v, want null", r+1, m[name])
				}
				continue
			}
			v, err := strconv.ParseFloat(string(m[name].(json.Number)), 32)
			if err != nil || float32(v) != want {
				t.Fatalf("line %d %s: %v, want %v", r+1, name, m[name], want)
			}
		}
		r++
	}
	if r != len(ids) {
		t.Errorf("%d lines, want %d", r, len(ids))
	}
}

func TestPredictionsErrors(t *testing.T) {
	dir := t.TempDir()
	for _, cols := range [][]string{nil, {""}, {"row_id"}, {"p", "p"}, {"\xff"}} {
		if _, err := CreatePredictions(filepath.Join(dir, "p.csv"), cols); !errkind.Is(err, errkind.BadInput) {
			t.Errorf("columns %q: error %v, want bad input", cols, err)
		}
	}
	if _, err := CreatePredictions(filepath.Join(dir, "p.xlsx"), []string{"p"}); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("xlsx: error %v, want bad input", err)
	}
	w, err := CreatePredictions(filepath.Join(dir, "p.csv"), []string{"p", "q"})
	if err != nil {
		t.Fatal(err)
	}
	if err := w.Write([]int64{1, 2}, []float32{1, 2, 3}); err == nil {
		t.Error("Write accepted 3 values for 2 rows of 2 columns")
	}
	w.Abort()
	entries, _ := os.ReadDir(dir)
	if len(entries) != 0 {
		t.Errorf("files left behind: %v", entries)
	}
}

// TestOutputAtomic checks that an output appears only at Close, that Abort
// leaves an existing file as it was, and that no temporary file remains.
func TestOutputAtomic(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "out.parquet")
	if err := os.WriteFile(path, []byte("old"), 0o644); err != nil {
		t.Fatal(err)
	}
	w, err := CreatePredictions(path, []string{"p"})
	if err != nil {
		t.Fatal(err)
	}
	if err := w.Write([]int64{1}, []float32{0.5}); err != nil {
		t.Fatal(err)
	}
	if err := w.Abort(); err != nil {
		t.Fatal(err)
	}
	if b, _ := os.ReadFile(path); string(b) != "old" {
		t.Errorf("after Abort the file holds %q", b)
	}
	h, err := CreateHoldout(path, HoldoutLayout{})
	if err != nil {
		t.Fatal(err)
	}
	if err := h.Write(HoldoutRow{Items: []string{"a"}, Values: []float32{1}, Label: 1}); err != nil {
		t.Fatal(err)
	}
	if b, _ := os.ReadFile(path); string(b) != "old" {
		t.Errorf("before Close the file holds %q", b)
	}
	if err := h.Close(); err != nil {
		t.Fatal(err)
	}
	if err := h.Abort(); err != nil {
		t.Errorf("Abort after Close: %v", err)
	}
	if b, _ := os.ReadFile(path); !bytes.HasPrefix(b, []byte("PAR1")) {
		t.Errorf("after Close the file is not Parquet: %q", b[:min(len(b), 8)])
	}
	entries, _ := os.ReadDir(dir)
	if len(entries) != 1 {
		t.Errorf("files in the folder: %v", entries)
	}
}

func TestHoldoutWriterChecks(t *testing.T) {
	layout := HoldoutLayout{Dense: []model.DenseInput{denseAffinity}, IntItems: true}
	good := HoldoutRow{Items: []string{"42"}, Values: []float32{1}, Dense: map[string][]float32{"show_affinity": {1, 2, 3, 4}}}
	cases := map[string]func(r *HoldoutRow){
		"lengths":       func(r *HoldoutRow) { r.Values = nil },
		"not integer":   func(r *HoldoutRow) { r.Items = []string{"042"} },
		"dense missing": func(r *HoldoutRow) { r.Dense = nil },
		"dense extra":   func(r *HoldoutRow) { r.Dense = map[string][]float32{"show_affinity": {1, 2, 3, 4}, "x": {1}} },
		"dense size":    func(r *HoldoutRow) { r.Dense = map[string][]float32{"show_affinity": {1}} },
	}
	for name, edit := range cases {
		for _, format := range []string{FormatParquet, FormatJSONL} {
			w, err := NewHoldoutWriter(io.Discard, format, layout)
			if err != nil {
				t.Fatal(err)
			}
			if err := w.Write(good); err != nil {
				t.Fatalf("%s %s: good row refused: %v", name, format, err)
			}
			bad := good
			edit(&bad)
			if err := w.Write(bad); !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "row 2") {
				t.Errorf("%s %s: error %v, want bad input naming row 2", name, format, err)
			}
		}
	}
	w, _ := NewHoldoutWriter(io.Discard, FormatJSONL, HoldoutLayout{})
	if err := w.Write(HoldoutRow{Items: []string{"a"}, Values: []float32{float32(math.NaN())}}); err == nil {
		t.Error("JSON Lines writer accepted NaN")
	}
	for _, d := range []model.DenseInput{{Name: "items", Size: 1}, {Name: "x", Size: 0}} {
		if _, err := NewHoldoutWriter(io.Discard, FormatParquet, HoldoutLayout{Dense: []model.DenseInput{d}}); err == nil {
			t.Errorf("layout with dense %+v accepted", d)
		}
	}
}

// TestHoldoutIntItemsRoundTrip writes integer ids in both formats and
// reads them back.
func TestHoldoutIntItemsRoundTrip(t *testing.T) {
	ids := []string{"1", "22", "-5", "100000"}
	v := testVocab(t, model.UnknownBucket, ids...)
	rows := []HoldoutRow{
		{RowID: 3, Items: []string{"22", "7", "-5"}, Values: []float32{1, 2, 3}, Label: 1},
		{RowID: 4, Items: nil, Values: nil, Label: 0},
		{RowID: 5, Items: []string{"100000"}, Values: []float32{0.5}, Label: 1},
	}
	for _, ext := range []string{".parquet", ".jsonl"} {
		path := filepath.Join(t.TempDir(), "ints"+ext)
		writeHoldout(t, path, HoldoutLayout{IntItems: true}, rows)
		got, _ := readAll(t, path, Options{Spec: testSpec(v), Vocab: v}, 2)
		want := &flat{
			Indptr: []int32{0, 3, 3, 4}, Indices: []int32{1, 4, 2, 3}, Values: []float32{1, 2, 3, 0.5},
			Labels: []float32{1, 0, 1}, Weights: []float32{1, 1, 1}, Slices: []string{"", "", ""}, RowIDs: []int64{3, 4, 5},
		}
		if diff := cmp.Diff(want, got); diff != "" {
			t.Errorf("%s (-want +got):\n%s", ext, diff)
		}
	}
}
