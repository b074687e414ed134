package data

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

// Two good JSON Lines rows: with and without labels; unknown fields are
// ignored.
const (
	goodLine        = `{"items":["ep-0",42],"values":[1,2],"show_affinity":[0,0.5,0,1],"label":1,"listener":"l-19","meta":{"a":[1,{"b":null}]}}`
	goodLineNoLabel = `{"items":["ep-0"],"values":[1],"show_affinity":[0,0,0,0]}`
)

func validationVocab(t testing.TB, unknown string) *Vocabulary {
	return testVocab(t, unknown, "ep-0", "42", "ep-2")
}

func TestJSONLRowErrors(t *testing.T) {
	cases := []struct {
		name    string
		line    string
		want    string
		noLabel bool   // the good rows before have no label
		unknown string // default bucket
	}{
		{"lengths differ", `{"items":["ep-0",42],"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "items has 2 ids but values has 1", false, ""},
		{"empty id", `{"items":[""],"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "items[0] is an empty id", false, ""},
		{"fractional id", `{"items":["ep-0",1.5],"values":[1,1],"show_affinity":[0,0,0,0],"label":1}`, "items[1] is 1.5, not an integer", false, ""},
		{"exponent id", `{"items":[1e3],"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "items[0] is 1e3, not an integer", false, ""},
		{"null id", `{"items":[null],"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "items[0] is null", false, ""},
		{"bool id", `{"items":[true],"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "items[0] is not a string or an integer", false, ""},
		{"huge id", `{"items":[99999999999999999999],"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "beyond the int64 range", false, ""},
		{"items null", `{"items":null,"values":[],"show_affinity":[0,0,0,0],"label":1}`, "items is null", false, ""},
		{"items not a list", `{"items":"ep-0","values":[1],"show_affinity":[0,0,0,0],"label":1}`, "items is not a list", false, ""},
		{"items missing", `{"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "items missing", false, ""},
		{"values missing", `{"items":["ep-0"],"show_affinity":[0,0,0,0],"label":1}`, "values missing", false, ""},
		{"negative value", `{"items":["ep-0",42],"values":[1,-2],"show_affinity":[0,0,0,0],"label":1}`, "values[1] is negative", false, ""},
		{"value beyond float32", `{"items":["ep-0"],"values":[1e39],"show_affinity":[0,0,0,0],"label":1}`, "values[0] is infinite or beyond float32 range", false, ""},
		{"null value", `{"items":["ep-0"],"values":[null],"show_affinity":[0,0,0,0],"label":1}`, "values[0] is null", false, ""},
		{"NaN token", `{"items":["ep-0"],"values":[NaN],"show_affinity":[0,0,0,0],"label":1}`, "values[0] is not a number", false, ""},
		{"label 2", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":2}`, "label 2 is not 0 or 1", false, ""},
		{"label 0.5", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":0.5}`, "label 0.5 is not 0 or 1", false, ""},
		{"label null", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":null}`, "label is null", false, ""},
		{"label string", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":"1"}`, "label is not a number or a boolean", false, ""},
		{"label missing", `{"items":[],"values":[],"show_affinity":[0,0,0,0]}`, "label missing", false, ""},
		{"label where none", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":0}`, "label present, but the file's first row has none", true, ""},
		{"negative weight", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":1,"weight":-1}`, "weight -1 is negative", false, ""},
		{"weight beyond float32", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":1,"weight":1e39}`, "weight 1e+39 is not finite", false, ""},
		{"dense missing", `{"items":[],"values":[],"label":1}`, `dense input "show_affinity" missing`, false, ""},
		{"dense short", `{"items":[],"values":[],"show_affinity":[0,0,0],"label":1}`, `dense input "show_affinity" has 3 numbers, want 4`, false, ""},
		{"dense scalar", `{"items":[],"values":[],"show_affinity":1,"label":1}`, `dense input "show_affinity" is not a list of numbers`, false, ""},
		{"dense null", `{"items":[],"values":[],"show_affinity":null,"label":1}`, `dense input "show_affinity" is null`, false, ""},
		{"dense null element", `{"items":[],"values":[],"show_affinity":[0,null,0,0],"label":1}`, `dense input "show_affinity"[1] is null`, false, ""},
		{"unknown refused", `{"items":["ep-0","ep-nope"],"values":[1,1],"show_affinity":[0,0,0,0],"label":1}`, `items[1]: unknown item id "ep-nope"`, false, model.UnknownRefuse},
		{"row_id fraction", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":1,"row_id":1.5}`, "row_id 1.5 is not an integer", false, ""},
		{"slice number", `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":1,"slice":3}`, "slice is not a string", false, ""},
		{"field twice", `{"items":[],"values":[],"items":[],"show_affinity":[0,0,0,0],"label":1}`, `field "items" appears twice`, false, ""},
		{"invalid UTF-8", "{\"items\":[\"ep-\xff\"],\"values\":[1],\"show_affinity\":[0,0,0,0],\"label\":1}", "not valid UTF-8", false, ""},
		{"lone surrogate", `{"items":["\ud800"],"values":[1],"show_affinity":[0,0,0,0],"label":1}`, "unpaired UTF-16 surrogate", false, ""},
		{"syntax", `{"items":["ep-0"] "values":[1]}`, "invalid JSON", false, ""},
		{"unterminated", `{"items":["ep-0`, "unterminated string", false, ""},
		{"not an object", `["ep-0"]`, "each line must be one JSON object", false, ""},
		{"trailing data", goodLine + ` {}`, "more after the object", false, ""},
		{"empty line", ``, "empty line", false, ""},
		{"blank line", "  \t", "empty line", false, ""},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			unknown := c.unknown
			if unknown == "" {
				unknown = model.UnknownBucket
			}
			v := validationVocab(t, unknown)
			good := goodLine
			if c.noLabel {
				good = goodLineNoLabel
			}
			path := filepath.Join(t.TempDir(), "holdout.jsonl")
			text := good + "\n" + good + "\n" + c.line + "\n" + good + "\n"
			if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
				t.Fatal(err)
			}
			r, err := Open(path, Options{Spec: testSpec(v, denseAffinity), Vocab: v})
			if err != nil {
				t.Fatal(err)
			}
			defer r.Close()
			var f Frame
			if n, err := r.Read(&f, 2); n != 2 || err != nil {
				t.Fatalf("first two rows: %d, %v", n, err)
			}
			n, err := r.Read(&f, 5)
			if n != 0 {
				t.Errorf("Read returned %d rows with the error", n)
			}
			rowErr(t, err, path, 3, c.want)
			if _, again := r.Read(&f, 5); again != err {
				t.Errorf("error not sticky: %v then %v", err, again)
			}
		})
	}
}

// Rows of a Parquet file written with parquet-go's generic writer, used to
// put values the HoldoutWriter would refuse into a file.
type pqRow struct {
	Items  []string  `parquet:"items,list"`
	Values []float64 `parquet:"values,list"`
	Age    []float32 `parquet:"listener_age,list"`
	Label  float64   `parquet:"label"`
	Weight float64   `parquet:"weight"`
}

type pqNullable struct {
	Items  []*string  `parquet:"items,optional,list"`
	Values []*float64 `parquet:"values,optional,list"`
	Age    *float64   `parquet:"listener_age,optional"`
	Label  *bool      `parquet:"label,optional"`
}

func TestParquetRowErrors(t *testing.T) {
	good := pqRow{Items: []string{"ep-0", "42"}, Values: []float64{1, 2}, Age: []float32{0.3}, Label: 1, Weight: 1}
	bad := func(edit func(r *pqRow)) []pqRow {
		r := good
		edit(&r)
		return []pqRow{good, good, r, good}
	}
	str := func(s string) *string { return &s }
	num := func(f float64) *float64 { return &f }
	yes := true
	goodN := pqNullable{Items: []*string{str("ep-0")}, Values: []*float64{num(1)}, Age: num(0.3), Label: &yes}
	badN := func(edit func(r *pqNullable)) []pqNullable {
		r := goodN
		edit(&r)
		return []pqNullable{goodN, goodN, r, goodN}
	}
	cases := []struct {
		name    string
		write   func(t *testing.T, path string)
		want    string
		unknown string
	}{
		{"lengths differ", func(t *testing.T, p string) {
			writeGeneric(t, p, bad(func(r *pqRow) { r.Values = []float64{1} }))
		}, "items has 2 ids but values has 1", ""},
		{"empty id", func(t *testing.T, p string) {
			writeGeneric(t, p, bad(func(r *pqRow) { r.Items = []string{"ep-0", ""} }))
		}, "items[1] is an empty id", ""},
		{"unknown refused", func(t *testing.T, p string) {
			writeGeneric(t, p, bad(func(r *pqRow) { r.Items = []string{"ep-0", "ep-nope"} }))
		}, `items[1]: unknown item id "ep-nope"`, model.UnknownRefuse},
		{"negative value", func(t *testing.T, p string) { writeGeneric(t, p, bad(func(r *pqRow) { r.Values = []float64{1, -1} })) }, "values[1] is negative", ""},
		{"NaN value", func(t *testing.T, p string) {
			writeGeneric(t, p, bad(func(r *pqRow) { r.Values = []float64{math.NaN(), 1} }))
		}, "values[0] is NaN", ""},
		{"Inf value", func(t *testing.T, p string) {
			writeGeneric(t, p, bad(func(r *pqRow) { r.Values = []float64{1, math.Inf(1)} }))
		}, "values[1] is infinite", ""},
		{"value beyond float32", func(t *testing.T, p string) {
			writeGeneric(t, p, bad(func(r *pqRow) { r.Values = []float64{1e300, 1} }))
		}, "values[0] is infinite or beyond float32 range", ""},
		{"label 2", func(t *testing.T, p string) { writeGeneric(t, p, bad(func(r *pqRow) { r.Label = 2 })) }, "label 2 is not 0 or 1", ""},
		{"negative weight", func(t *testing.T, p string) { writeGeneric(t, p, bad(func(r *pqRow) { r.Weight = -0.5 })) }, "weight -0.5 is negative", ""},
		{"NaN weight", func(t *testing.T, p string) { writeGeneric(t, p, bad(func(r *pqRow) { r.Weight = math.NaN() })) }, "weight NaN is not finite", ""},
		{"Inf weight", func(t *testing.T, p string) { writeGeneric(t, p, bad(func(r *pqRow) { r.Weight = math.Inf(1) })) }, "weight +Inf is not finite", ""},
		{"dense wrong length", func(t *testing.T, p string) { writeGeneric(t, p, bad(func(r *pqRow) { r.Age = []float32{1, 2} })) }, `dense input "listener_age" has 2 numbers, want 1`, ""},
		{"dense not finite", func(t *testing.T, p string) {
			writeGeneric(t, p, bad(func(r *pqRow) { r.Age = []float32{float32(math.Inf(-1))} }))
		}, `dense input "listener_age" [0] is not finite`, ""},
		{"items null", func(t *testing.T, p string) {
			writeGeneric(t, p, badN(func(r *pqNullable) { r.Items, r.Values = nil, nil }))
		}, "items is null", ""},
		{"null id", func(t *testing.T, p string) {
			writeGeneric(t, p, badN(func(r *pqNullable) { r.Items = []*string{str("ep-0"), nil}; r.Values = []*float64{num(1), num(1)} }))
		}, "items[1] is null", ""},
		{"null value", func(t *testing.T, p string) {
			writeGeneric(t, p, badN(func(r *pqNullable) { r.Values = []*float64{nil} }))
		}, "values[0] is null", ""},
		{"label null", func(t *testing.T, p string) { writeGeneric(t, p, badN(func(r *pqNullable) { r.Label = nil })) }, "label is null", ""},
		{"dense null", func(t *testing.T, p string) { writeGeneric(t, p, badN(func(r *pqNullable) { r.Age = nil })) }, `dense input "listener_age" is null`, ""},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			unknown := c.unknown
			if unknown == "" {
				unknown = model.UnknownBucket
			}
			v := validationVocab(t, unknown)
			path := filepath.Join(t.TempDir(), "holdout.parquet")
			c.write(t, path)
			r, err := Open(path, Options{Spec: testSpec(v, denseAge), Vocab: v})
			if err != nil {
				t.Fatal(err)
			}
			defer r.Close()
			var f Frame
			if n, err := r.Read(&f, 2); n != 2 || err != nil {
				t.Fatalf("first two rows: %d, %v", n, err)
			}
			_, err = r.Read(&f, 5)
			rowErr(t, err, path, 3, c.want)
		})
	}
}

func TestParquetEmptyListIsARow(t *testing.T) {
	// An empty list is the row with no activity, not a null.
	v := validationVocab(t, model.UnknownBucket)
	path := filepath.Join(t.TempDir(), "empty.parquet")
	e := pqNullable{Items: []*string{}, Values: []*float64{}, Age: new(float64)}
	e.Label = new(bool)
	writeGeneric(t, path, []pqNullable{e, e})
	got, _ := readAll(t, path, Options{Spec: testSpec(v, denseAge), Vocab: v}, 10)
	if len(got.Indptr) != 3 || len(got.Indices) != 0 {
		t.Errorf("got %+v, want two empty rows", got)
	}
}

func TestParquetSchemaErrors(t *testing.T) {
	type doubleItems struct {
		Items  []float64 `parquet:"items,list"`
		Values []float64 `parquet:"values,list"`
		Label  int32     `parquet:"label"`
	}
	type scalarValues struct {
		Items  []string `parquet:"items,list"`
		Values float64  `parquet:"values"`
	}
	type listLabel struct {
		Items  []string  `parquet:"items,list"`
		Values []float64 `parquet:"values,list"`
		Label  []int64   `parquet:"label,list"`
	}
	type noValues struct {
		Items []string `parquet:"items,list"`
	}
	type nested struct {
		Items  [][]string `parquet:"items,list"`
		Values []float64  `parquet:"values,list"`
	}
	type dateLabel struct {
		Items  []string  `parquet:"items,list"`
		Values []float64 `parquet:"values,list"`
		Label  int32     `parquet:"label,date"`
	}
	type plain struct {
		Items  []string  `parquet:"items,list"`
		Values []float64 `parquet:"values,list"`
	}
	cases := []struct {
		name  string
		write func(t *testing.T, p string)
		dense []model.DenseInput
		req   bool
		want  string
	}{
		{"items of doubles", func(t *testing.T, p string) { writeGeneric(t, p, []doubleItems{{}}) }, nil, false, `column "items" has values of type DOUBLE, want integer or string`},
		{"scalar values", func(t *testing.T, p string) { writeGeneric(t, p, []scalarValues{{}}) }, nil, false, `column "values" is a single value, want a list`},
		{"list label", func(t *testing.T, p string) { writeGeneric(t, p, []listLabel{{}}) }, nil, false, `column "label" is a list, want a single value`},
		{"no values", func(t *testing.T, p string) { writeGeneric(t, p, []noValues{{}}) }, nil, false, `no "values" column`},
		{"nested list", func(t *testing.T, p string) { writeGeneric(t, p, []nested{{}}) }, nil, false, `column "items" is a nested list`},
		{"date label", func(t *testing.T, p string) { writeGeneric(t, p, []dateLabel{{}}) }, nil, false, `column "label" has values of type DATE`},
		{"dense missing", func(t *testing.T, p string) { writeGeneric(t, p, []plain{{}}) }, []model.DenseInput{denseAge}, false, `no column for dense input "listener_age"`},
		{"labels required", func(t *testing.T, p string) { writeGeneric(t, p, []plain{{}}) }, nil, true, `no "label" column`},
		{"not parquet", func(t *testing.T, p string) { os.WriteFile(p, []byte("PAR1 but not really"), 0o600) }, nil, false, "not a readable Parquet file"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			v := validationVocab(t, model.UnknownBucket)
			path := filepath.Join(t.TempDir(), "holdout.parquet")
			c.write(t, path)
			_, err := Open(path, Options{Spec: testSpec(v, c.dense...), Vocab: v, RequireLabels: c.req})
			if err == nil || !strings.Contains(err.Error(), c.want) || !strings.Contains(err.Error(), path) {
				t.Fatalf("error %v, want one naming %s and containing %q", err, path, c.want)
			}
			if !errkind.Is(err, errkind.BadInput) {
				t.Errorf("kind %v, want bad input", errkind.Of(err))
			}
		})
	}
}

func TestOpenFormats(t *testing.T) {
	v := validationVocab(t, model.UnknownBucket)
	opts := Options{Spec: testSpec(v), Vocab: v}
	dir := t.TempDir()
	line := []byte(`{"items":["ep-0"],"values":[1],"label":1}` + "\n")
	for _, name := range []string{"a.jsonl", "b.NDJSON", "c.JsonL"} {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, line, 0o600); err != nil {
			t.Fatal(err)
		}
		got, _ := readAll(t, p, opts, 4)
		if len(got.RowIDs) != 1 {
			t.Errorf("%s: %d rows, want 1", name, len(got.RowIDs))
		}
	}
	for _, name := range []string{"d.csv", "e.json", "f.txt", "g"} {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, line, 0o600); err != nil {
			t.Fatal(err)
		}
		if _, err := Open(p, opts); err == nil || !errkind.Is(err, errkind.BadInput) {
			t.Errorf("%s: Open error %v, want a bad-input refusal", name, err)
		}
	}
	if _, err := OpenReader(strings.NewReader(string(line)), int64(len(line)), "NDJSON", opts); err != nil {
		t.Errorf("OpenReader ndjson: %v", err)
	}
	if _, err := OpenReader(strings.NewReader(""), 0, "avro", opts); err == nil {
		t.Error("OpenReader accepted avro")
	}
	r, err := OpenReader(strings.NewReader(string(line)), int64(len(line)), FormatJSONL, opts)
	if err != nil {
		t.Fatal(err)
	}
	var f Frame
	if _, err := r.Read(&f, 0); err == nil {
		t.Error("Read with max 0 succeeded")
	}
	if r.Rows() != -1 {
		t.Errorf("JSON Lines Rows() = %d, want -1", r.Rows())
	}
	// Options that do not fit together.
	other := testVocab(t, model.UnknownDrop, "x")
	if _, err := OpenReader(strings.NewReader(""), 0, FormatJSONL, Options{Spec: testSpec(v), Vocab: other}); err == nil {
		t.Error("a vocabulary of another input was accepted")
	}
	clash := model.DenseInput{Name: "label", Size: 1}
	if _, err := OpenReader(strings.NewReader(""), 0, FormatJSONL, Options{Spec: testSpec(v, clash), Vocab: v}); err == nil {
		t.Error("a dense input named label was accepted")
	}
}

func TestJSONLLabels(t *testing.T) {
	v := validationVocab(t, model.UnknownBucket)
	spec := testSpec(v, denseAffinity)
	text := goodLineNoLabel + "\n" + goodLineNoLabel + "\n"
	// Without RequireLabels a file without labels reads, HasLabels false.
	r, _ := OpenReader(strings.NewReader(text), int64(len(text)), FormatJSONL, Options{Spec: spec, Vocab: v, Name: "to-score.jsonl"})
	var f Frame
	if n, err := r.Read(&f, 10); n != 2 || err != nil || f.HasLabels || len(f.Labels) != 0 {
		t.Errorf("Read = %d, %v, HasLabels %v, %d labels", n, err, f.HasLabels, len(f.Labels))
	}
	// With it, row 1 is refused.
	r, _ = OpenReader(strings.NewReader(text), int64(len(text)), FormatJSONL, Options{Spec: spec, Vocab: v, RequireLabels: true, Name: "to-score.jsonl"})
	_, err := r.Read(&f, 10)
	rowErr(t, err, "to-score.jsonl", 1, "label missing")
}

func TestJSONLLongLine(t *testing.T) {
	v := validationVocab(t, model.UnknownBucket)
	long := `{"items":[],"values":[],"label":1,"pad":"` + strings.Repeat("x", MaxLineBytes) + `"}`
	text := `{"items":[],"values":[],"label":1}` + "\n" + long + "\n"
	r, err := OpenReader(strings.NewReader(text), int64(len(text)), FormatJSONL, Options{Spec: testSpec(v), Vocab: v, Name: "big.jsonl"})
	if err != nil {
		t.Fatal(err)
	}
	var f Frame
	if n, err := r.Read(&f, 1); n != 1 || err != nil {
		t.Fatalf("row 1: %d, %v", n, err)
	}
	_, err = r.Read(&f, 1)
	rowErr(t, err, "big.jsonl", 2, fmt.Sprintf("line longer than %d bytes", MaxLineBytes))
}

func TestValidate(t *testing.T) {
	v := validationVocab(t, model.UnknownBucket)
	opts := Options{Spec: testSpec(v, denseAffinity), Vocab: v}
	lines := make([]string, 10)
	for i := range lines {
		lines[i] = goodLine
	}
	lines[1] = `{"items":["ep-0"],"values":[-1],"show_affinity":[0,0,0,0],"label":1}`
	lines[4] = `{"items":[`
	lines[8] = `{"items":[],"values":[],"show_affinity":[0,0,0,0],"label":7}`
	path := filepath.Join(t.TempDir(), "holdout.jsonl")
	if err := os.WriteFile(path, []byte(strings.Join(lines, "\n")), 0o600); err != nil {
		t.Fatal(err)
	}
	errs := Validate(path, opts)
	if len(errs) != 3 {
		t.Fatalf("Validate: %d errors %v, want 3", len(errs), errs)
	}
	rowErr(t, errs[0], path, 2, "values[0] is negative")
	rowErr(t, errs[1], path, 5, "invalid JSON")
	rowErr(t, errs[2], path, 9, "label 7 is not 0 or 1")

	// Parquet, bad rows 2 and 4 of 5.
	good := pqRow{Items: []string{"ep-0"}, Values: []float64{1}, Age: []float32{1}, Label: 1, Weight: 1}
	badLen, badWt := good, good
	badLen.Values = nil
	badWt.Weight = -1
	ppath := filepath.Join(t.TempDir(), "holdout.parquet")
	writeGeneric(t, ppath, []pqRow{good, badLen, good, badWt, good})
	errs = Validate(ppath, Options{Spec: testSpec(v, denseAge), Vocab: v})
	if len(errs) != 2 {
		t.Fatalf("Validate parquet: %d errors %v, want 2", len(errs), errs)
	}
	rowErr(t, errs[0], ppath, 2, "items has 1 ids but values has 0")
	rowErr(t, errs[1], ppath, 4, "weight -1 is negative")

	// A good file.
	gpath := filepath.Join(t.TempDir(), "good.parquet")
	writeHoldout(t, gpath, HoldoutLayout{Dense: []model.DenseInput{denseAffinity}}, genRows(5, 100, 3, 5, denseAffinity))
	if errs := Validate(gpath, opts); errs != nil {
		t.Errorf("Validate good file: %v", errs)
	}

	// The list stops at MaxErrors.
	many := strings.Repeat(`{"items":[]}`+"\n", 3*MaxErrors)
	if errs := ValidateReader(strings.NewReader(many), int64(len(many)), FormatJSONL, opts); len(errs) != MaxErrors {
		t.Errorf("Validate: %d errors, want %d", len(errs), MaxErrors)
	}
	// A file that cannot be opened is one error.
	if errs := Validate(filepath.Join(t.TempDir(), "missing.parquet"), opts); len(errs) != 1 {
		t.Errorf("Validate missing file: %v", errs)
	}
}

// errReaderAt fails every read past a point: the reader must report it,
// not panic or loop.
type errReaderAt struct {
	r    io.ReaderAt
	fail int64
}

func (e errReaderAt) ReadAt(p []byte, off int64) (int, error) {
	if off+int64(len(p)) > e.fail && off < e.fail+1 {
		return 0, errors.New("disk on fire")
	}
	return e.r.ReadAt(p, off)
}

func TestParquetReadFailure(t *testing.T) {
	v := testVocab(t, model.UnknownBucket, episodeIDs(50)...)
	path := filepath.Join(t.TempDir(), "h.parquet")
	writeHoldout(t, path, HoldoutLayout{RowGroupRows: 100}, genRows(2, 1000, 50, 10))
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	// Fail somewhere in the middle of the column data, after the footer
	// was read.
	r, err := OpenReader(errReaderAt{strings.NewReader(string(data)), int64(len(data) / 2)}, int64(len(data)), FormatParquet,
		Options{Spec: testSpec(v), Vocab: v, Name: "h.parquet"})
	if err != nil {
		t.Fatal(err)
	}
	var f Frame
	for {
		_, err := r.Read(&f, 64)
		if err == io.EOF {
			t.Fatal("read the whole file through a failing reader")
		}
		if err != nil {
			if !strings.Contains(err.Error(), "h.parquet") {
				t.Errorf("error %v does not name the file", err)
			}
			break
		}
	}
}
