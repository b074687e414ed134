package data

import (
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"github.com/google/go-cmp/cmp"
	"github.com/parquet-go/parquet-go"

	"github.com/modelgate/modelgate/internal/model"
)

// readOutcome is everything Read gives for a file: the frames
// concatenated and the error that ended reading ("" at the end of the file).
type readOutcome struct {
	Flat      flat
	Clusters  []uint64
	HasLabels []bool
	Batches   []int
	Err       string
}

func readOutcomeOf(t *testing.T, path string, opts Options, batch int) readOutcome {
	t.Helper()
	var out readOutcome
	r, err := Open(path, opts)
	if err != nil {
		out.Err = "open: " + err.Error()
		return out
	}
	defer r.Close()
	var f Frame
	for {
		n, err := r.Read(&f, batch)
		if errors.Is(err, io.EOF) {
			// Reading on after the end gives the end again.
			if n, err := r.Read(&f, batch); n != 0 || !errors.Is(err, io.EOF) {
				t.Errorf("a read after the end gave %d, %v", n, err)
			}
			return out
		}
		if err != nil {
			out.Err = err.Error()
			// Errors are sticky.
			if _, err2 := r.Read(&f, batch); err2 == nil || err2.Error() != err.Error() {
				t.Errorf("a read after %v gave %v", err, err2)
			}
			return out
		}
		if n != f.Rows() || len(f.Weights) != n || len(f.RowIDs) != n || len(f.Slices) != n {
			t.Fatalf("Read gave %d rows, the frame has %d (%d weights, %d ids, %d slices)", n, f.Rows(), len(f.Weights), len(f.RowIDs), len(f.Slices))
		}
		out.Batches = append(out.Batches, n)
		out.HasLabels = append(out.HasLabels, f.HasLabels)
		out.Flat.add(&f)
		out.Clusters = append(out.Clusters, f.Clusters...)
	}
}

// sameOnBothPaths reads path column by column and row by row, in batches
// of several sizes, and fails when the frames or the errors differ.
func sameOnBothPaths(t *testing.T, path string, opts Options) readOutcome {
	t.Helper()
	var first readOutcome
	for i, batch := range []int{1, 3, 7, 64, 4096} {
		col := opts
		row := opts
		row.rowPath = true
		got, want := readOutcomeOf(t, path, col, batch), readOutcomeOf(t, path, row, batch)
		if diff := cmp.Diff(want, got); diff != "" {
			t.Fatalf("batch %d: column by column differs from row by row (-row +column):\n%s", batch, diff)
		}
		if i == 0 {
			first = got
		}
	}
	return first
}

// writeWith writes rows with parquet-go's generic writer and options.
func writeWith[T any](t *testing.T, path string, rows []T, opts ...parquet.WriterOption) {
	t.Helper()
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	w := parquet.NewGenericWriter[T](f, opts...)
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

func TestParquetColumnarMatchesRowPath(t *testing.T) {
	dir := t.TempDir()
	for _, unknown := range []string{model.UnknownBucket, model.UnknownDrop, model.UnknownRefuse} {
		for name, layout := range map[string]HoldoutLayout{
			"full":      {Dense: []model.DenseInput{denseAge, denseAffinity}, Weights: true, Slices: true, Cluster: "listener", RowGroupRows: 50},
			"minimal":   {RowGroupRows: 1000},
			"no-labels": {NoLabels: true, Dense: []model.DenseInput{denseAffinity}},
			"int-items": {IntItems: true, Dense: []model.DenseInput{denseAge}, RowGroupRows: 17},
		} {
			t.Run("holdout-writer/"+name+"/"+unknown, func(t *testing.T) {
				v := testVocab(t, unknown, episodeIDs(300)...)
				rows := genRows(5, 400, 300, 12, layout.Dense...)
				for i := range rows {
					rows[i].Cluster = fmt.Sprint("listener-", i%37)
					if layout.IntItems {
						for j := range rows[i].Items {
							rows[i].Items[j] = fmt.Sprint(100000 + 3*j + 2)
						}
					}
				}
				path := filepath.Join(dir, name+unknown+".parquet")
				writeHoldout(t, path, layout, rows)
				opts := Options{Spec: testSpec(v, layout.Dense...), Vocab: v, ClusterColumn: layout.Cluster}
				out := sameOnBothPaths(t, path, opts)
				if unknown == model.UnknownRefuse {
					if out.Err == "" && !layout.IntItems {
						t.Errorf("no error for unknown ids under the refuse rule")
					}
				} else if out.Err != "" || len(out.Flat.RowIDs) != len(rows) {
					t.Errorf("read %d rows, error %q; want %d rows", len(out.Flat.RowIDs), out.Err, len(rows))
				}
			})
		}
	}

	// Other physical types and shapes, tiny pages, many row groups,
	// dictionary encoding and version 1 data pages (whose rows may run
	// on from one page to the next).
	type dictRow struct {
		Items    []string  `parquet:"items,list,dict"`
		Values   []float32 `parquet:"values,list"`
		Age      float32   `parquet:"listener_age,dict"`
		Label    int32     `parquet:"label"`
		Slice    string    `parquet:"slice,dict"`
		RowID    uint32    `parquet:"row_id"`
		Listener int64     `parquet:"listener"`
	}
	type unsignedRow struct {
		Items  []uint64  `parquet:"items,list"`
		Values []uint32  `parquet:"values,list"`
		Age    []float64 `parquet:"listener_age"`
		Label  float32   `parquet:"label"`
		RowID  uint64    `parquet:"row_id"`
	}
	rng := rand.New(rand.NewPCG(9, 9))
	ids := []string{"ep-0", "42", "ep-2", "nope", "7"}
	var dict []dictRow
	var uns []unsignedRow
	var indep []independentRow
	for r := range 300 {
		d := dictRow{Age: float32(r%5) / 4, Label: int32(r % 2), Slice: []string{"a", "", "b"}[r%3], RowID: uint32(r * 11), Listener: int64(r % 13)}
		u := unsignedRow{Age: []float64{float64(r)}, Label: float32(r % 2), RowID: uint64(r)}
		in := independentRow{Age: float64(r), Label: r%2 == 0, Slice: "s", Index: int64(r)}
		for range rng.IntN(40) {
			d.Items = append(d.Items, ids[rng.IntN(len(ids))])
			d.Values = append(d.Values, float32(rng.IntN(50)))
			u.Items = append(u.Items, uint64(rng.IntN(50)))
			u.Values = append(u.Values, uint32(rng.IntN(50)))
			in.Items = append(in.Items, int64(rng.IntN(50)))
			in.Values = append(in.Values, float64(rng.IntN(50))/8)
		}
		in.Affinity = []float32{1, 2, 3, float32(r)}
		if r%5 != 0 {
			w := float64(r % 3)
			in.Weight = &w
		}
		dict, uns, indep = append(dict, d), append(uns, u), append(indep, in)
	}
	spec := func(v *Vocabulary, dense ...model.DenseInput) Options {
		return Options{Spec: testSpec(v, dense...), Vocab: v}
	}
	v := validationVocab(t, model.UnknownBucket)
	vInts := testVocab(t, model.UnknownBucket, "1", "2", "3", "42", "ep-0")
	small := []parquet.WriterOption{parquet.PageBufferSize(256), parquet.MaxRowsPerRowGroup(23)}
	v1 := append([]parquet.WriterOption{parquet.DataPageVersion(1)}, small...)
	cases := []struct {
		name  string
		write func(path string)
		opts  Options
	}{
		{"dictionary", func(p string) { writeWith(t, p, dict, small...) }, func() Options {
			o := spec(v, denseAge)
			o.ClusterColumn = "listener"
			return o
		}()},
		{"dictionary-v1-pages", func(p string) { writeWith(t, p, dict, v1...) }, spec(v, denseAge)},
		{"one-row-group", func(p string) { writeWith(t, p, dict) }, spec(v, denseAge)},
		// Many pages to a chunk, scalar columns' too.
		{"small-pages", func(p string) { writeWith(t, p, indep, parquet.PageBufferSize(64)) }, spec(vInts, denseAge, denseAffinity)},
		{"small-dictionary-pages", func(p string) { writeWith(t, p, dict, parquet.PageBufferSize(64)) }, spec(v, denseAge)},
		{"unsigned", func(p string) { writeWith(t, p, uns, small...) }, spec(vInts, denseAge)},
		{"unsigned-v1-pages", func(p string) { writeWith(t, p, uns, v1...) }, spec(vInts, denseAge)},
		{"independent", func(p string) { writeWith(t, p, indep, small...) }, spec(vInts, denseAge, denseAffinity)},
		{"independent-v1-pages", func(p string) { writeWith(t, p, indep, v1...) }, spec(vInts, denseAge, denseAffinity)},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			path := filepath.Join(dir, c.name+".parquet")
			c.write(path)
			if c.name == "dictionary" && !hasDictionaryPage(t, path, "items") {
				t.Fatal("the file has no dictionary-encoded items page")
			}
			out := sameOnBothPaths(t, path, c.opts)
			if out.Err != "" || len(out.Flat.RowIDs) != 300 {
				t.Errorf("read %d rows, error %q; want 300 rows", len(out.Flat.RowIDs), out.Err)
			}
		})
	}
	// Dictionary-encoded ids under the other unknown-id rules: an entry
	// mapped once serves every row that uses it, a refused one fails the
	// first row that uses it.
	for _, unknown := range []string{model.UnknownDrop, model.UnknownRefuse} {
		t.Run("dictionary/"+unknown, func(t *testing.T) {
			path := filepath.Join(dir, "dictionary-"+unknown+".parquet")
			writeWith(t, path, dict, small...)
			out := sameOnBothPaths(t, path, spec(validationVocab(t, unknown), denseAge))
			if unknown == model.UnknownRefuse && out.Err == "" {
				t.Error("no error for an unknown id under the refuse rule")
			}
			if unknown == model.UnknownDrop && (out.Err != "" || len(out.Flat.RowIDs) != 300) {
				t.Errorf("read %d rows, error %q; want 300 rows", len(out.Flat.RowIDs), out.Err)
			}
		})
	}
}

// TestParquetColumnarErrorsMatchRowPath: bad rows (nulls, empty lists,
// bad values) at several places give the same error, with the same row
// number, on both paths.
func TestParquetColumnarErrorsMatchRowPath(t *testing.T) {
	str := func(s string) *string { return &s }
	num := func(f float64) *float64 { return &f }
	yes := true
	good := pqNullable{Items: []*string{str("ep-0"), str("42")}, Values: []*float64{num(1), num(2)}, Age: num(0.3), Label: &yes}
	edits := map[string]func(r *pqNullable){
		"empty lists":           func(r *pqNullable) { r.Items, r.Values = []*string{}, []*float64{} },
		"items null":            func(r *pqNullable) { r.Items = nil },
		"values null":           func(r *pqNullable) { r.Values = nil },
		"both null":             func(r *pqNullable) { r.Items, r.Values = nil, nil },
		"null id":               func(r *pqNullable) { r.Items = []*string{str("ep-0"), nil} },
		"null id then empty id": func(r *pqNullable) { r.Items = []*string{nil, str("")} },
		"empty id then null id": func(r *pqNullable) { r.Items = []*string{str(""), nil} },
		"null value":            func(r *pqNullable) { r.Values = []*float64{num(1), nil} },
		"negative value":        func(r *pqNullable) { r.Values = []*float64{num(1), num(-2)} },
		"NaN value":             func(r *pqNullable) { r.Values = []*float64{num(math.NaN()), num(1)} },
		"huge value":            func(r *pqNullable) { r.Values = []*float64{num(1), num(1e300)} },
		"lengths differ":        func(r *pqNullable) { r.Values = []*float64{num(1)} },
		"unknown id":            func(r *pqNullable) { r.Items = []*string{str("ep-0"), str("ep-nope")} },
		"badly spelt id":        func(r *pqNullable) { r.Items = []*string{str("ep-0"), str(" 42")} },
		"null id, null value":   func(r *pqNullable) { r.Items[1], r.Values[0] = nil, nil },
		"label null":            func(r *pqNullable) { r.Label = nil },
		"age null":              func(r *pqNullable) { r.Age = nil },
		"age NaN":               func(r *pqNullable) { r.Age = num(math.NaN()) },
		"age null, label null":  func(r *pqNullable) { r.Age, r.Label = nil, nil },
	}
	for name, edit := range edits {
		for _, at := range []int{0, 5, 29, 59} {
			for _, unknown := range []string{model.UnknownBucket, model.UnknownRefuse} {
				t.Run(fmt.Sprintf("%s/row%d/%s", name, at, unknown), func(t *testing.T) {
					rows := make([]pqNullable, 60)
					for i := range rows {
						rows[i] = good
						rows[i].Items = append([]*string(nil), good.Items...)
						rows[i].Values = append([]*float64(nil), good.Values...)
					}
					edit(&rows[at])
					path := filepath.Join(t.TempDir(), "bad.parquet")
					writeWith(t, path, rows, parquet.PageBufferSize(128), parquet.MaxRowsPerRowGroup(11))
					v := validationVocab(t, unknown)
					out := sameOnBothPaths(t, path, Options{Spec: testSpec(v, denseAge), Vocab: v})
					if name == "empty lists" || name == "unknown id" && unknown == model.UnknownBucket {
						if out.Err != "" {
							t.Errorf("%s", out.Err)
						}
					} else if out.Err == "" {
						t.Errorf("no error")
					}
				})
			}
		}
	}
}

// TestParquetValidateMatchesRowPath: Validate, which reads column by
// column and reads a row group with a bad row again row by row, lists the
// same errors as reading row by row throughout: bad rows in several row
// groups, several in one group, a group's first and last rows, and more
// bad rows than MaxErrors.
func TestParquetValidateMatchesRowPath(t *testing.T) {
	str := func(s string) *string { return &s }
	num := func(f float64) *float64 { return &f }
	yes := true
	good := pqNullable{Items: []*string{str("ep-0"), str("42")}, Values: []*float64{num(1), num(2)}, Age: num(0.3), Label: &yes}
	edits := []func(r *pqNullable){
		func(r *pqNullable) { r.Items = nil },
		func(r *pqNullable) { r.Values = []*float64{num(1), num(-2)} },
		func(r *pqNullable) { r.Items = []*string{str("ep-0"), str("ep-nope")} },
		func(r *pqNullable) { r.Label = nil },
		func(r *pqNullable) { r.Age = num(math.NaN()) },
		func(r *pqNullable) { r.Values = []*float64{num(1)} },
		func(r *pqNullable) { r.Items = []*string{str(""), nil} },
	}
	for name, bad := range map[string][]int{
		"few":  {0, 10, 11, 12, 40, 54, 59},
		"one":  {33},
		"none": {},
		"over-the-limit": func() []int {
			var b []int
			for i := 0; i < 260; i += 2 {
				b = append(b, i)
			}
			return b
		}(),
	} {
		t.Run(name, func(t *testing.T) {
			rows := make([]pqNullable, 60)
			if name == "over-the-limit" {
				rows = make([]pqNullable, 260)
			}
			for i := range rows {
				rows[i] = good
				rows[i].Items = append([]*string(nil), good.Items...)
				rows[i].Values = append([]*float64(nil), good.Values...)
			}
			for i, at := range bad {
				edits[i%len(edits)](&rows[at])
			}
			path := filepath.Join(t.TempDir(), "bad.parquet")
			writeWith(t, path, rows, parquet.PageBufferSize(128), parquet.MaxRowsPerRowGroup(11))
			v := validationVocab(t, model.UnknownRefuse)
			opts := Options{Spec: testSpec(v, denseAge), Vocab: v}
			rowOpts := opts
			rowOpts.rowPath = true
			str := func(errs []error) []string {
				var s []string
				for _, e := range errs {
					s = append(s, e.Error())
				}
				return s
			}
			want := str(Validate(path, rowOpts))
			// Batches of 7 rows also start and end inside row groups.
			defer func(n int) { collectBatch = n }(collectBatch)
			var got []string
			for _, batch := range []int{7, 4096} {
				collectBatch = batch
				got = str(Validate(path, opts))
				if diff := cmp.Diff(want, got); diff != "" {
					t.Fatalf("batch %d: column by column differs from row by row (-row +column):\n%s", batch, diff)
				}
			}
			if wantN := min(len(bad), MaxErrors); len(got) != wantN {
				t.Errorf("%d errors, want %d: %q", len(got), wantN, got)
			}
		})
	}
}

// hasDictionaryPage reports whether a page of the named column (a list's
// element) in the file's first row group is dictionary-encoded.
func hasDictionaryPage(t *testing.T, path, name string) bool {
	t.Helper()
	pf := openParquetFile(t, path)
	col, err := newColumn(name, pf.Root().Column(name), shapeList, idKinds)
	if err != nil {
		t.Fatal(err)
	}
	pages := pf.RowGroups()[0].ColumnChunks()[col.index].Pages()
	defer pages.Close()
	for {
		page, err := pages.ReadPage()
		if err != nil {
			return false
		}
		dict := page.Dictionary() != nil
		parquet.Release(page)
		if dict {
			return true
		}
	}
}

// TestLevelWords: the word-at-a-time level scans agree with byte loops
// on random levels of every length up to 40 at every start.
func TestLevelWords(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	for n := 0; n <= 40; n++ {
		for range 40 {
			b := make([]byte, n)
			for i := range b {
				b[i] = byte(rng.IntN(3)) // levels 0-2, a few 255s
				if rng.IntN(50) == 0 {
					b[i] = 255
				}
			}
			for x := range byte(3) {
				want, all := 0, true
				for _, v := range b {
					if v == x {
						want++
					} else {
						all = false
					}
				}
				if got := countEqual(b, x); got != want {
					t.Fatalf("countEqual(%v, %d) = %d, want %d", b, x, got, want)
				}
				if got := allEqual(b, x); got != all {
					t.Fatalf("allEqual(%v, %d) = %v, want %v", b, x, got, all)
				}
			}
			// rowLengths from every zero, for every count of rows,
			// against a byte loop.
			for start := 0; start < n; start++ {
				if b[start] != 0 {
					continue
				}
				for k := 0; k <= n; k++ {
					var want []int32
					end := start
					for i := start + 1; i < n && len(want) < k; i++ {
						if b[i] == 0 {
							want = append(want, int32(i-end))
							end = i
						}
					}
					got, gotEnd := rowLengths(b, start, k, nil)
					if !slices.Equal(got, want) || gotEnd != end {
						t.Fatalf("rowLengths(%v, %d, %d) = %v, %d; want %v, %d", b, start, k, got, gotEnd, want, end)
					}
				}
			}
		}
	}
}
