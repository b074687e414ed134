package data

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/compress/zstd"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

// HoldoutRow is one row to write to a holdout file.
type HoldoutRow struct {
	RowID  int64
	Items  []string  // raw item ids
	Values []float32 // one per item
	// Dense holds one vector per dense input of the layout, of its size.
	Dense map[string][]float32
	Label float32 // written unless the layout has NoLabels
	// Weight is written when the layout has Weights; a zero Weight is
	// then a weight of 0, not the default 1.
	Weight float32
	Slice  string // written when the layout has Slices
	// Cluster is written, as a string, to the layout's Cluster column.
	Cluster string
}

// HoldoutLayout says which columns a holdout file has (see the package
// documentation for the schema).
type HoldoutLayout struct {
	// Dense lists the dense inputs, one column each, in this order.
	Dense []model.DenseInput
	// IntItems writes items as int64; every id must then be the canonical
	// decimal form of an int64 ("42", not "042").
	IntItems bool
	// NoLabels leaves out the label column (a file to score, not to
	// evaluate).
	NoLabels bool
	// Weights writes the weight column; Slices the slice column.
	Weights bool
	Slices  bool
	// Cluster, when not empty, names a string column written from each
	// row's Cluster (the listener id of listener × show rows).
	Cluster string
	// RowGroupRows bounds the rows of a Parquet row group (default 65536).
	RowGroupRows int
}

// HoldoutWriter writes a holdout file.
type HoldoutWriter interface {
	// Write appends rows. It refuses, as errkind.BadInput, a row whose
	// Items and Values differ in length, whose Dense lacks a layout input,
	// has another one or a vector of the wrong size, whose ids are not valid
	// UTF-8 (or not integers with IntItems), or which has a non-finite
	// number in a JSON Lines file. It does not judge values (negative
	// values, labels other than 0 and 1 are written as given), so that
	// tests can make bad holdouts; readers refuse those.
	Write(rows ...HoldoutRow) error
	// Close finishes the file. For CreateHoldout the file appears at its
	// path only now, complete.
	Close() error
	// Abort discards the output: CreateHoldout's path is left as it was.
	// It does nothing after Close.
	Abort() error
}

// CreateHoldout creates a holdout file whose format follows the extension
// of path (.parquet, or .jsonl / .ndjson; case-insensitive). The file is
// written to a temporary name beside path and renamed into place by Close.
func CreateHoldout(path string, layout HoldoutLayout) (HoldoutWriter, error) {
	format, err := FormatOf(path)
	if err != nil {
		return nil, err
	}
	if format == FormatCSV {
		return nil, errkind.New(errkind.BadInput, "%s: CSV is not a holdout format (want .parquet, .jsonl or .ndjson)", path)
	}
	af, err := createAtomic(path)
	if err != nil {
		return nil, err
	}
	w, err := NewHoldoutWriter(af, format, layout)
	if err != nil {
		af.abort()
		return nil, err
	}
	hw := w.(*holdoutWriter)
	hw.file = af
	return hw, nil
}

// NewHoldoutWriter writes a holdout in format ("parquet", "jsonl" or
// "ndjson") to w. Close finishes the format but does not close w.
func NewHoldoutWriter(w io.Writer, format string, layout HoldoutLayout) (HoldoutWriter, error) {
	seen := map[string]bool{layout.Cluster: layout.Cluster != ""}
	if reservedColumn(layout.Cluster) || !utf8.ValidString(layout.Cluster) {
		return nil, errkind.New(errkind.BadInput, "cluster column name %q is a holdout column's or not UTF-8", layout.Cluster)
	}
	for _, d := range layout.Dense {
		switch {
		case reservedColumn(d.Name) || d.Name == "":
			return nil, errkind.New(errkind.BadInput, "dense input name %q is empty or a holdout column's", d.Name)
		case d.Size <= 0:
			return nil, errkind.New(errkind.BadInput, "dense input %q has size %d", d.Name, d.Size)
		case seen[d.Name]:
			return nil, errkind.New(errkind.BadInput, "dense input %q named twice, or also as the cluster column", d.Name)
		}
		seen[d.Name] = true
	}
	if layout.RowGroupRows <= 0 {
		layout.RowGroupRows = 64 << 10
	}
	hw := &holdoutWriter{layout: layout}
	switch strings.ToLower(format) {
	case FormatParquet:
		hw.enc = newHoldoutParquet(w, layout)
	case FormatJSONL, "ndjson":
		hw.enc = &holdoutJSONL{w: bufio.NewWriter(w), layout: layout}
	default:
		return nil, errkind.New(errkind.BadInput, "unknown holdout format %q (want parquet or jsonl)", format)
	}
	return hw, nil
}

type holdoutEncoder interface {
	write(rows []HoldoutRow) error
	finish() error
}

type holdoutWriter struct {
	layout HoldoutLayout
	enc    holdoutEncoder
	file   *atomicFile
	rows   int64
	err    error
	done   bool
}

func (h *holdoutWriter) Write(rows ...HoldoutRow) error {
	if h.err != nil {
		return h.err
	}
	if h.done {
		return errors.New("holdout writer is closed")
	}
	for i := range rows {
		if err := h.check(&rows[i]); err != nil {
			return errkind.New(errkind.BadInput, "writing holdout row %d: %v", h.rows+int64(i)+1, err)
		}
	}
	if err := h.enc.write(rows); err != nil {
		h.err = fmt.Errorf("writing holdout: %w", err)
		return h.err
	}
	h.rows += int64(len(rows))
	return nil
}

func (h *holdoutWriter) check(r *HoldoutRow) error {
	if len(r.Items) != len(r.Values) {
		return fmt.Errorf("%d items but %d values", len(r.Items), len(r.Values))
	}
	for _, id := range r.Items {
		if !utf8.ValidString(id) {
			return fmt.Errorf("item id %q is not valid UTF-8", id)
		}
		if h.layout.IntItems {
			if _, ok := canonicalInt([]byte(id)); !ok {
				return fmt.Errorf("item id %q is not an integer in canonical decimal form", id)
			}
		}
	}
	if len(r.Dense) != len(h.layout.Dense) {
		return fmt.Errorf("%d dense vectors, the layout has %d dense inputs", len(r.Dense), len(h.layout.Dense))
	}
	for _, d := range h.layout.Dense {
		v, ok := r.Dense[d.Name]
		if !ok {
			return fmt.Errorf("no vector for dense input %q", d.Name)
		}
		if len(v) != d.Size {
			return fmt.Errorf("dense input %q has %d numbers, want %d", d.Name, len(v), d.Size)
		}
	}
	if h.layout.Slices && !utf8.ValidString(r.Slice) {
		return fmt.Errorf("slice %q is not valid UTF-8", r.Slice)
	}
	if h.layout.Cluster != "" && !utf8.ValidString(r.Cluster) {
		return fmt.Errorf("cluster %q is not valid UTF-8", r.Cluster)
	}
	return nil
}

func (h *holdoutWriter) Close() error {
	if h.done {
		return h.err
	}
	h.done = true
	if h.err == nil {
		if err := h.enc.finish(); err != nil {
			h.err = fmt.Errorf("writing holdout: %w", err)
		}
	}
	if h.file != nil {
		if h.err != nil {
			h.file.abort()
		} else {
			h.err = h.file.commit()
		}
	}
	return h.err
}

func (h *holdoutWriter) Abort() error {
	if h.done {
		return nil
	}
	h.done = true
	h.err = errors.New("holdout writer aborted")
	if h.file != nil {
		return h.file.abort()
	}
	return nil
}

// holdoutParquet writes the schema in column order row_id, items, values,
// the dense inputs, label, weight, slice.
type holdoutParquet struct {
	layout  HoldoutLayout
	w       *parquet.Writer
	rows    []parquet.Row
	arena   []byte // bytes of the ids of the rows being written
	colItem int
	colVal  int
	colDen  int // first dense column
	colLab  int
	colWt   int
	colSl   int
	colCl   int
}

func newHoldoutParquet(w io.Writer, layout HoldoutLayout) *holdoutParquet {
	floatList := func() parquet.Node { return parquet.List(parquet.Leaf(parquet.FloatType)) }
	names := []string{colRowID, colItems, colValues}
	items := parquet.List(parquet.String())
	if layout.IntItems {
		items = parquet.List(parquet.Leaf(parquet.Int64Type))
	}
	nodes := []parquet.Node{parquet.Leaf(parquet.Int64Type), items, floatList()}
	h := &holdoutParquet{layout: layout, colItem: 1, colVal: 2, colDen: 3}
	for _, d := range layout.Dense {
		names = append(names, d.Name)
		nodes = append(nodes, floatList())
	}
	next := len(names)
	h.colLab, h.colWt, h.colSl = -1, -1, -1
	if !layout.NoLabels {
		names, nodes = append(names, colLabel), append(nodes, parquet.Leaf(parquet.FloatType))
		h.colLab, next = next, next+1
	}
	if layout.Weights {
		names, nodes = append(names, colWeight), append(nodes, parquet.Leaf(parquet.FloatType))
		h.colWt, next = next, next+1
	}
	if layout.Slices {
		names, nodes = append(names, colSlice), append(nodes, parquet.String())
		h.colSl, next = next, next+1
	}
	h.colCl = -1
	if layout.Cluster != "" {
		names, nodes = append(names, layout.Cluster), append(nodes, parquet.String())
		h.colCl = next
	}
	schema := parquet.NewSchema("holdout", newOrderedGroup(names, nodes))
	h.w = parquet.NewWriter(w, schema,
		parquet.MaxRowsPerRowGroup(int64(layout.RowGroupRows)),
		parquet.Compression(&zstd.Codec{}),
		parquet.CreatedBy("modelgate", "", ""),
	)
	return h
}

// appendList appends a list's values at column col (a required list of
// required elements: definition level 1 for an element, one null at level
// 0 for an empty list).
func appendList(row parquet.Row, n int, col int, elem func(i int) parquet.Value) parquet.Row {
	if n == 0 {
		return append(row, parquet.NullValue().Level(0, 0, col))
	}
	for i := range n {
		rep := 1
		if i == 0 {
			rep = 0
		}
		row = append(row, elem(i).Level(rep, 1, col))
	}
	return row
}

func (h *holdoutParquet) write(rows []HoldoutRow) error {
	const chunk = 256
	for len(rows) > 0 {
		n := min(len(rows), chunk)
		if cap(h.rows) < n {
			h.rows = make([]parquet.Row, chunk)
		}
		out := h.rows[:n]
		h.arena = h.arena[:0]
		for r := range out {
			hr := &rows[r]
			row := append(out[r][:0], parquet.Int64Value(hr.RowID).Level(0, 0, 0))
			row = appendList(row, len(hr.Items), h.colItem, func(i int) parquet.Value {
				if h.layout.IntItems {
					n, _ := canonicalInt([]byte(hr.Items[i]))
					return parquet.Int64Value(n)
				}
				// The arena may move as it grows; earlier slices keep
				// pointing at the old, unchanged bytes, and the writer
				// copies them all in WriteRows.
				start := len(h.arena)
				h.arena = append(h.arena, hr.Items[i]...)
				return parquet.ByteArrayValue(h.arena[start:len(h.arena):len(h.arena)])
			})
			row = appendList(row, len(hr.Values), h.colVal, func(i int) parquet.Value { return parquet.FloatValue(hr.Values[i]) })
			for k, d := range h.layout.Dense {
				v := hr.Dense[d.Name]
				row = appendList(row, len(v), h.colDen+k, func(i int) parquet.Value { return parquet.FloatValue(v[i]) })
			}
			if h.colLab >= 0 {
				row = append(row, parquet.FloatValue(hr.Label).Level(0, 0, h.colLab))
			}
			if h.colWt >= 0 {
				row = append(row, parquet.FloatValue(hr.Weight).Level(0, 0, h.colWt))
			}
			if h.colSl >= 0 {
				start := len(h.arena)
				h.arena = append(h.arena, hr.Slice...)
				row = append(row, parquet.ByteArrayValue(h.arena[start:len(h.arena):len(h.arena)]).Level(0, 0, h.colSl))
			}
			if h.colCl >= 0 {
				start := len(h.arena)
				h.arena = append(h.arena, hr.Cluster...)
				row = append(row, parquet.ByteArrayValue(h.arena[start:len(h.arena):len(h.arena)]).Level(0, 0, h.colCl))
			}
			out[r] = row
		}
		if _, err := h.w.WriteRows(out); err != nil {
			return err
		}
		rows = rows[n:]
	}
	return nil
}

func (h *holdoutParquet) finish() error { return h.w.Close() }

// holdoutJSONL writes one object per line, keys in the Parquet column order.
type holdoutJSONL struct {
	w      *bufio.Writer
	layout HoldoutLayout
	line   []byte
}

func (h *holdoutJSONL) write(rows []HoldoutRow) error {
	for r := range rows {
		hr := &rows[r]
		b := append(h.line[:0], `{"row_id":`...)
		b = strconv.AppendInt(b, hr.RowID, 10)
		b = append(b, `,"items":[`...)
		for i, id := range hr.Items {
			if i > 0 {
				b = append(b, ',')
			}
			if h.layout.IntItems {
				b = append(b, id...) // canonical decimal: a JSON integer as is
			} else {
				b = appendJSONString(b, id)
			}
		}
		b = append(b, `],"values":`...)
		var err error
		if b, err = appendFloats(b, hr.Values, colValues); err != nil {
			return err
		}
		for _, d := range h.layout.Dense {
			b = append(b, ',')
			b = appendJSONString(b, d.Name)
			b = append(b, ':')
			if b, err = appendFloats(b, hr.Dense[d.Name], d.Name); err != nil {
				return err
			}
		}
		if !h.layout.NoLabels {
			if b, err = appendField(b, colLabel, hr.Label); err != nil {
				return err
			}
		}
		if h.layout.Weights {
			if b, err = appendField(b, colWeight, hr.Weight); err != nil {
				return err
			}
		}
		if h.layout.Slices {
			b = append(b, `,"slice":`...)
			b = appendJSONString(b, hr.Slice)
		}
		if h.layout.Cluster != "" {
			b = append(b, ',')
			b = appendJSONString(b, h.layout.Cluster)
			b = append(b, ':')
			b = appendJSONString(b, hr.Cluster)
		}
		b = append(b, '}', '\n')
		h.line = b
		if _, err := h.w.Write(b); err != nil {
			return err
		}
	}
	return nil
}

func (h *holdoutJSONL) finish() error { return h.w.Flush() }

func finite(v float32) bool { return v == v && !math.IsInf(float64(v), 0) }

func appendFloats(b []byte, vs []float32, what string) ([]byte, error) {
	b = append(b, '[')
	for i, v := range vs {
		if !finite(v) {
			return b, errkind.New(errkind.BadInput, "%s[%d] is %v; JSON has no such number", what, i, v)
		}
		if i > 0 {
			b = append(b, ',')
		}
		b = strconv.AppendFloat(b, float64(v), 'g', -1, 32)
	}
	return append(b, ']'), nil
}

func appendField(b []byte, name string, v float32) ([]byte, error) {
	if !finite(v) {
		return b, errkind.New(errkind.BadInput, "%s is %v; JSON has no such number", name, v)
	}
	b = append(b, ',', '"')
	b = append(b, name...)
	b = append(b, '"', ':')
	return strconv.AppendFloat(b, float64(v), 'g', -1, 32), nil
}
