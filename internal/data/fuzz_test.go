package data

import (
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"math"
	"strconv"
	"testing"

	"github.com/google/go-cmp/cmp"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

var fuzzDense = []model.DenseInput{{Name: "age", Size: 1}, {Name: "aff", Size: 2}}

func FuzzJSONL(f *testing.F) {
	for _, s := range []string{
		`{"items":["ep-0",42,-7],"values":[1,2.5,3e2],"age":0.5,"aff":[1,-1],"label":1,"weight":0.5,"slice":"new","row_id":9}`,
		`{"items":[],"values":[],"age":[1],"aff":[0,0],"label":false,"x":{"y":[null,true,"\u00e9"]}}` + "\n" + `{"items":[1.5]}`,
		`{"\u0069tems":["a\"b\\c\/\ud83c\udfa7"],"values":[0],"age":1,"aff":[2,3],"label":0.0}`,
		"\uFEFF{\"items\":[],\"values\":[],\"age\":1,\"aff\":[2,3]}\r\n\n{}",
		`{"items":[99999999999999999999],"values":[1e39],"age":null,"aff":"x","label":2,"weight":-1}`,
		`[1,2]`, `{`, `{"items":[`, `{"items":["\ud800"]}`, "{\"items\":[\"\xff\"]}", `{"items":[],"items":[]}`,
	} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		v := testVocab(t, model.UnknownBucket, "ep-0", "42", "-7")
		opts := Options{Spec: testSpec(v, fuzzDense...), Vocab: v, Name: "fuzz.jsonl"}

		// The whole input: no panic, bad input only as BadInput, every
		// frame well formed.
		r, err := OpenReader(bytes.NewReader(data), int64(len(data)), FormatJSONL, opts)
		if err != nil {
			t.Fatal(err)
		}
		var fr Frame
		for {
			n, err := r.Read(&fr, 3)
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				if !errkind.Is(err, errkind.BadInput) {
					t.Fatalf("error %v is not bad input", err)
				}
				break
			}
			checkFrame(t, &fr, n, v)
		}
		_ = ValidateReader(bytes.NewReader(data), int64(len(data)), FormatJSONL, opts)

		// Each line alone: when the reader accepts it, it is valid JSON
		// and decodes as encoding/json decodes it.
		for _, line := range bytes.Split(data, []byte{'\n'}) {
			if bytes.HasPrefix(line, []byte("\uFEFF")) {
				continue
			}
			r, _ := OpenReader(bytes.NewReader(line), int64(len(line)), FormatJSONL, opts)
			n, err := r.Read(&fr, 1)
			if err != nil || n != 1 {
				continue
			}
			if !json.Valid(line) {
				t.Fatalf("accepted invalid JSON %q", line)
			}
			want, err := refDecode(line, v)
			if err != nil {
				t.Fatalf("accepted %q, but the reference decoder says %v", line, err)
			}
			var got flat
			got.add(&fr)
			if diff := cmp.Diff(want, &got); diff != "" {
				t.Fatalf("%q decoded differently (-encoding/json +reader):\n%s", line, diff)
			}
		}
	})
}

// checkFrame checks the invariants of a frame of n rows.
func checkFrame(t *testing.T, f *Frame, n int, v *Vocabulary) {
	t.Helper()
	if f.Rows() != n || len(f.Weights) != n || len(f.Slices) != n || len(f.RowIDs) != n {
		t.Fatalf("frame of %d rows: %d indptr, %d weights, %d slices, %d row ids", n, len(f.Indptr), len(f.Weights), len(f.Slices), len(f.RowIDs))
	}
	if f.HasLabels != (len(f.Labels) == n) || (!f.HasLabels && len(f.Labels) != 0) {
		t.Fatalf("HasLabels %v with %d labels for %d rows", f.HasLabels, len(f.Labels), n)
	}
	if f.Indptr[0] != 0 || int(f.Indptr[n]) != len(f.Indices) || len(f.Indices) != len(f.Values) {
		t.Fatalf("bad CSR: indptr %v, %d indices, %d values", f.Indptr, len(f.Indices), len(f.Values))
	}
	for r := range n {
		if f.Indptr[r] > f.Indptr[r+1] {
			t.Fatalf("indptr not monotone: %v", f.Indptr)
		}
	}
	for i, ix := range f.Indices {
		if ix < 0 || int(ix) > v.Len() || f.Values[i] < 0 || math.IsInf(float64(f.Values[i]), 0) || f.Values[i] != f.Values[i] {
			t.Fatalf("pair %d: index %d value %v", i, ix, f.Values[i])
		}
	}
	for _, d := range fuzzDense {
		if len(f.Dense[d.Name]) != n*d.Size {
			t.Fatalf("dense %s: %d numbers for %d rows", d.Name, len(f.Dense[d.Name]), n)
		}
	}
	for _, l := range f.Labels {
		if l != 0 && l != 1 {
			t.Fatalf("label %v", l)
		}
	}
	for _, w := range f.Weights {
		if !(w >= 0) || math.IsInf(float64(w), 0) {
			t.Fatalf("weight %v", w)
		}
	}
}

// refDecode decodes one accepted line with encoding/json, following the
// schema in the package documentation.
func refDecode(line []byte, v *Vocabulary) (*flat, error) {
	dec := json.NewDecoder(bytes.NewReader(line))
	dec.UseNumber()
	var m map[string]any
	if err := dec.Decode(&m); err != nil {
		return nil, err
	}
	num := func(x any) (float32, error) {
		n, ok := x.(json.Number)
		if !ok {
			return 0, errors.New("not a number")
		}
		f, err := strconv.ParseFloat(string(n), 64)
		if err != nil && !errors.Is(err, strconv.ErrRange) {
			return 0, err
		}
		return float32(f), nil
	}
	fl := &flat{Indptr: []int32{0}, Dense: map[string][]float32{}}
	items, _ := m["items"].([]any)
	values, _ := m["values"].([]any)
	if len(items) != len(values) {
		return nil, errors.New("lengths differ")
	}
	for i, it := range items {
		var (
			ix   int32
			keep bool
			err  error
		)
		switch id := it.(type) {
		case string:
			ix, keep, err = v.Map(id)
		case json.Number:
			n, perr := strconv.ParseInt(string(id), 10, 64)
			if perr != nil {
				return nil, perr
			}
			ix, keep, err = v.Map(strconv.FormatInt(n, 10))
		default:
			return nil, errors.New("bad id")
		}
		if err != nil {
			return nil, err
		}
		val, err := num(values[i])
		if err != nil {
			return nil, err
		}
		if keep {
			fl.Indices = append(fl.Indices, ix)
			fl.Values = append(fl.Values, val)
		}
	}
	fl.Indptr = append(fl.Indptr, int32(len(fl.Indices)))
	for _, d := range fuzzDense {
		switch x := m[d.Name].(type) {
		case []any:
			for _, e := range x {
				f, err := num(e)
				if err != nil {
					return nil, err
				}
				fl.Dense[d.Name] = append(fl.Dense[d.Name], f)
			}
		default:
			f, err := num(x)
			if err != nil {
				return nil, err
			}
			fl.Dense[d.Name] = append(fl.Dense[d.Name], f)
		}
	}
	switch l := m["label"].(type) {
	case nil:
	case bool:
		fl.Labels = []float32{0}
		if l {
			fl.Labels[0] = 1
		}
	default:
		f, err := num(l)
		if err != nil {
			return nil, err
		}
		fl.Labels = []float32{f}
	}
	fl.Weights = []float32{1}
	if w, ok := m["weight"]; ok && w != nil {
		f, err := num(w)
		if err != nil {
			return nil, err
		}
		fl.Weights[0] = f
	}
	s, _ := m["slice"].(string)
	fl.Slices = []string{s}
	fl.RowIDs = []int64{0}
	if id, ok := m["row_id"].(json.Number); ok {
		n, err := strconv.ParseInt(string(id), 10, 64)
		if err != nil {
			return nil, err
		}
		fl.RowIDs[0] = n
	}
	return fl, nil
}
