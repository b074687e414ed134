package data

import (
	"bufio"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/compress/zstd"

	"github.com/modelgate/modelgate/internal/errkind"
)

// PredWriter writes predictions (the output of `score --out FILE`): one row
// per scored row, its row id followed by one number per column.
//
// Formats: Parquet has a required int64 column row_id followed by one
// required float (float32) column per name, in the given order, in row
// groups of at most 131072 rows, zstd-compressed. JSON Lines has one object
// per row, {"row_id":7,"p":0.25}, keys in column order; a NaN or infinite
// value is written as null. CSV has a header line "row_id,<names...>" (names
// quoted as RFC 4180 requires) then one line per row; numbers are written in
// the shortest form that reads back as the same float32 ("NaN", "+Inf" and
// "-Inf" for non-finite values); lines end with "\n".
type PredWriter interface {
	// Write appends len(rowIDs) rows; values holds len(rowIDs)×len(cols)
	// numbers, row by row.
	Write(rowIDs []int64, values []float32) error
	// Close finishes the output. For CreatePredictions the file appears at
	// its path only now, complete.
	Close() error
	// Abort discards the output: CreatePredictions' path is left as it
	// was. It does nothing after Close.
	Abort() error
}

// CreatePredictions creates a predictions file whose format follows the
// extension of path (.parquet, .jsonl or .ndjson, .csv; case-insensitive).
// cols names the numbers of each row (["p"] for a scorer, the code
// dimensions for an encoder): non-empty, distinct, valid UTF-8, and not
// "row_id". The file is written to a temporary name beside path and renamed
// into place by Close.
func CreatePredictions(path string, cols []string) (PredWriter, error) {
	format, err := FormatOf(path)
	if err != nil {
		return nil, err
	}
	if err := checkPredColumns(cols); err != nil {
		return nil, err
	}
	af, err := createAtomic(path)
	if err != nil {
		return nil, err
	}
	w, err := NewPredictionWriter(af, format, cols)
	if err != nil {
		af.abort()
		return nil, err
	}
	pw := w.(*predWriter)
	pw.file = af
	return pw, nil
}

// NewPredictionWriter writes predictions in format ("parquet", "jsonl",
// "ndjson" or "csv") to w. Close finishes the format but does not close w.
func NewPredictionWriter(w io.Writer, format string, cols []string) (PredWriter, error) {
	if err := checkPredColumns(cols); err != nil {
		return nil, err
	}
	pw := &predWriter{cols: len(cols)}
	switch strings.ToLower(format) {
	case FormatParquet:
		pw.enc = newPredParquet(w, cols)
	case FormatJSONL, "ndjson":
		pw.enc = newPredJSONL(w, cols)
	case FormatCSV:
		enc, err := newPredCSV(w, cols)
		if err != nil {
			return nil, err
		}
		pw.enc = enc
	default:
		return nil, errkind.New(errkind.BadInput, "unknown predictions format %q (want parquet, jsonl or csv)", format)
	}
	return pw, nil
}

func checkPredColumns(cols []string) error {
	if len(cols) == 0 {
		return errkind.New(errkind.BadInput, "predictions need at least one column")
	}
	seen := make(map[string]bool, len(cols))
	for _, c := range cols {
		switch {
		case c == "":
			return errkind.New(errkind.BadInput, "empty predictions column name")
		case c == colRowID:
			return errkind.New(errkind.BadInput, "predictions column %q is reserved for the row id", c)
		case !utf8.ValidString(c):
			return errkind.New(errkind.BadInput, "predictions column name %q is not valid UTF-8", c)
		case seen[c]:
			return errkind.New(errkind.BadInput, "predictions column %q named twice", c)
		}
		seen[c] = true
	}
	return nil
}

// predEncoder writes one format.
type predEncoder interface {
	write(rowIDs []int64, values []float32, cols int) error
	finish() error
}

type predWriter struct {
	cols int
	enc  predEncoder
	file *atomicFile // nil for NewPredictionWriter
	err  error       // sticky
	done bool
}

func (p *predWriter) Write(rowIDs []int64, values []float32) error {
	if p.err != nil {
		return p.err
	}
	if p.done {
		return errors.New("predictions writer is closed")
	}
	if len(values) != len(rowIDs)*p.cols {
		return fmt.Errorf("writing predictions: %d row ids and %d values, want %d values", len(rowIDs), len(values), len(rowIDs)*p.cols)
	}
	if err := p.enc.write(rowIDs, values, p.cols); err != nil {
		p.err = fmt.Errorf("writing predictions: %w", err)
		return p.err
	}
	return nil
}

func (p *predWriter) Close() error {
	if p.done {
		return p.err
	}
	p.done = true
	if p.err != nil {
		if p.file != nil {
			p.file.abort()
		}
		return p.err
	}
	if err := p.enc.finish(); err != nil {
		p.err = fmt.Errorf("writing predictions: %w", err)
		if p.file != nil {
			p.file.abort()
		}
		return p.err
	}
	if p.file != nil {
		if err := p.file.commit(); err != nil {
			p.err = err
		}
	}
	return p.err
}

func (p *predWriter) Abort() error {
	if p.done {
		return nil
	}
	p.done = true
	p.err = errors.New("predictions writer aborted")
	if p.file != nil {
		return p.file.abort()
	}
	return nil
}

// orderedGroup is a Parquet group whose fields keep the given order
// (parquet.Group sorts them by name).
type orderedGroup struct {
	parquet.Group
	fields []parquet.Field
}

func newOrderedGroup(names []string, nodes []parquet.Node) orderedGroup {
	g := make(parquet.Group, len(names))
	for i, n := range names {
		g[n] = nodes[i]
	}
	fields := g.Fields()
	pos := make(map[string]int, len(names))
	for i, n := range names {
		pos[n] = i
	}
	slices.SortFunc(fields, func(a, b parquet.Field) int { return pos[a.Name()] - pos[b.Name()] })
	return orderedGroup{Group: g, fields: fields}
}

func (g orderedGroup) Fields() []parquet.Field { return g.fields }

// predParquet writes rows of flat columns: row_id then the floats.
type predParquet struct {
	w    *parquet.Writer
	rows []parquet.Row
}

// predRowGroupRows bounds the rows a Parquet writer holds before it writes
// a row group out.
const predRowGroupRows = 128 << 10

func newPredParquet(w io.Writer, cols []string) *predParquet {
	names := append([]string{colRowID}, cols...)
	nodes := make([]parquet.Node, len(names))
	nodes[0] = parquet.Leaf(parquet.Int64Type)
	for i := range cols {
		nodes[i+1] = parquet.Leaf(parquet.FloatType)
	}
	schema := parquet.NewSchema("predictions", newOrderedGroup(names, nodes))
	return &predParquet{w: parquet.NewWriter(w, schema,
		parquet.MaxRowsPerRowGroup(predRowGroupRows),
		parquet.Compression(&zstd.Codec{}),
		parquet.CreatedBy("modelgate", "", ""),
	)}
}

func (p *predParquet) write(rowIDs []int64, values []float32, cols int) error {
	const chunk = 1024
	for len(rowIDs) > 0 {
		n := min(len(rowIDs), chunk)
		if cap(p.rows) < n {
			p.rows = make([]parquet.Row, chunk)
		}
		rows := p.rows[:n]
		for r := range rows {
			row := append(rows[r][:0], parquet.Int64Value(rowIDs[r]).Level(0, 0, 0))
			for c, v := range values[r*cols : (r+1)*cols] {
				row = append(row, parquet.FloatValue(v).Level(0, 0, c+1))
			}
			rows[r] = row
		}
		if _, err := p.w.WriteRows(rows); err != nil {
			return err
		}
		rowIDs, values = rowIDs[n:], values[n*cols:]
	}
	return nil
}

func (p *predParquet) finish() error { return p.w.Close() }

// predJSONL writes {"row_id":…,"<col>":…} lines.
type predJSONL struct {
	w    *bufio.Writer
	keys [][]byte // `,"<col>":` for each column
	line []byte
}

func newPredJSONL(w io.Writer, cols []string) *predJSONL {
	p := &predJSONL{w: bufio.NewWriter(w)}
	for _, c := range cols {
		k := appendJSONString([]byte{','}, c)
		p.keys = append(p.keys, append(k, ':'))
	}
	return p
}

func (p *predJSONL) write(rowIDs []int64, values []float32, cols int) error {
	for r, id := range rowIDs {
		b := append(p.line[:0], `{"row_id":`...)
		b = strconv.AppendInt(b, id, 10)
		for c, v := range values[r*cols : (r+1)*cols] {
			b = append(b, p.keys[c]...)
			b = appendJSONFloat(b, v)
		}
		b = append(b, '}', '\n')
		p.line = b
		if _, err := p.w.Write(b); err != nil {
			return err
		}
	}
	return nil
}

func (p *predJSONL) finish() error { return p.w.Flush() }

// predCSV writes RFC 4180 CSV with a header line.
type predCSV struct {
	w    *bufio.Writer
	line []byte
}

func newPredCSV(w io.Writer, cols []string) (*predCSV, error) {
	bw := bufio.NewWriter(w)
	cw := csv.NewWriter(bw)
	if err := cw.Write(append([]string{colRowID}, cols...)); err != nil {
		return nil, err
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return nil, err
	}
	return &predCSV{w: bw}, nil
}

func (p *predCSV) write(rowIDs []int64, values []float32, cols int) error {
	for r, id := range rowIDs {
		b := strconv.AppendInt(p.line[:0], id, 10)
		for _, v := range values[r*cols : (r+1)*cols] {
			b = append(b, ',')
			b = strconv.AppendFloat(b, float64(v), 'g', -1, 32)
		}
		b = append(b, '\n')
		p.line = b
		if _, err := p.w.Write(b); err != nil {
			return err
		}
	}
	return nil
}

func (p *predCSV) finish() error { return p.w.Flush() }

// appendJSONFloat writes v in the shortest form that reads back as the
// same float32; null when v is not finite.
func appendJSONFloat(b []byte, v float32) []byte {
	if v != v || math.IsInf(float64(v), 0) {
		return append(b, "null"...)
	}
	return strconv.AppendFloat(b, float64(v), 'g', -1, 32)
}

// appendJSONString writes s (valid UTF-8) as a JSON string.
func appendJSONString(b []byte, s string) []byte {
	const hex = "0123456789abcdef"
	b = append(b, '"')
	for i := 0; i < len(s); i++ {
		c := s[i]
		switch {
		case c == '"' || c == '\\':
			b = append(b, '\\', c)
		case c == '\n':
			b = append(b, '\\', 'n')
		case c == '\r':
			b = append(b, '\\', 'r')
		case c == '\t':
			b = append(b, '\\', 't')
		case c < 0x20:
			b = append(b, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xf])
		default:
			b = append(b, c)
		}
	}
	return append(b, '"')
}
