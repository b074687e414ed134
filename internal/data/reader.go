package data

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fileio"
	"github.com/modelgate/modelgate/internal/model"
)

// Holdout file formats, as OpenReader and NewHoldoutWriter name them.
const (
	FormatParquet = "parquet"
	FormatJSONL   = "jsonl"
	FormatCSV     = "csv" // predictions only
)

// MaxLineBytes is the longest JSON Lines line a reader accepts, newline
// excluded; a longer line is refused.
const MaxLineBytes = 16 << 20

// MaxErrors is the most errors Validate returns.
const MaxErrors = 100

// Frame is a batch of holdout rows: the sparse input and dense inputs as the
// runtime consumes them (model.Batch: ids mapped through the vocabulary and
// its unknown-id rule, values as read, neither transformed nor merged for
// duplicates) plus each row's label, weight, slice and row id.
//
// All per-row slices have Rows() entries after a successful Read, except
// Labels, which is empty when HasLabels is false. A Frame may be reused
// across Read calls: Read keeps its memory.
type Frame struct {
	model.Batch
	Labels  []float32 // 0 or 1
	Weights []float32 // finite, >= 0; 1 when the file has none
	Slices  []string  // "" when the file has none
	RowIDs  []int64   // the file's row_id, or the 0-based row number in the file
	// Clusters holds each row's ClusterKey when Options.ClusterColumn
	// names a column; empty otherwise.
	Clusters []uint64
	// HasLabels says whether the file has labels.
	HasLabels bool
}

// Reset empties the frame, keeping its memory for reuse.
func (f *Frame) Reset() {
	f.Batch.Reset()
	f.Labels = f.Labels[:0]
	f.Weights = f.Weights[:0]
	f.Slices = f.Slices[:0]
	f.RowIDs = f.RowIDs[:0]
	f.Clusters = f.Clusters[:0]
	f.HasLabels = false
}

// Options say how to read a holdout.
type Options struct {
	// Spec gives the dense inputs (one column each). It must have exactly one
	// sparse input, the one Vocab was parsed for.
	Spec *model.Spec
	// Vocab maps raw item ids to weight rows, applying the input's
	// unknown-id rule.
	Vocab *Vocabulary
	// RequireLabels refuses a file without labels.
	RequireLabels bool
	// Name is how errors name the file. Open uses the path when it is empty;
	// OpenReader uses "holdout".
	Name string
	// ClusterColumn, when not empty, names a column every row must have: a
	// string or an integer saying which cluster (for example which
	// listener) the row belongs to. Frame.Clusters gets its ClusterKey.
	ClusterColumn string
	// EveryColumn also checks, in a Parquet file, the columns no model
	// reads yet (a dense input is any other column): each must be a single
	// value or a list of values, as a dense input is. A list of structs, a
	// map or a nested list can feed no model and is refused, naming the
	// column. A push of a holdout sets it.
	EveryColumn bool

	// rowPath reads a Parquet file value by value (the reader's general
	// path) instead of column by column; tests compare the two.
	rowPath bool
}

// ClusterKey is the key of a cluster column's value: the 64-bit FNV-1a
// hash of its text (an integer's decimal form, so 42 and "42" are one
// cluster) passed through the SplitMix64 finaliser. Distinct values share
// a key with probability about n²/2^65 for n clusters (3e-8 for a
// million), in which case the two clusters count as one.
func ClusterKey(text []byte) uint64 {
	h := uint64(14695981039346656037)
	for _, c := range text {
		h ^= uint64(c)
		h *= 1099511628211
	}
	h = (h ^ (h >> 30)) * 0xbf58476d1ce4e5b9
	h = (h ^ (h >> 27)) * 0x94d049bb133111eb
	return h ^ (h >> 31)
}

// Reader streams the rows of a holdout file in batches, with memory bounded
// by the batch size and the file's page (Parquet) or line (JSON Lines) size,
// never by the file size.
type Reader interface {
	// Read empties f and fills it with up to max rows (max > 0), returning
	// how many. It returns (0, io.EOF) once all rows were read, and never a
	// count above zero together with an error. A bad row is reported as an
	// errkind.BadInput error (a *RowError inside) naming the file and the
	// row's 1-based number; after any error f's content is unspecified and
	// further calls return the same error.
	Read(f *Frame, max int) (int, error)
	// Rows is the number of rows in the file when the format records it
	// (Parquet), otherwise -1.
	Rows() int64
	// Close releases the reader; it closes the file Open opened, never a
	// reader given to OpenReader.
	Close() error
}

// Skipper is a Reader that can move past rows without reading all of
// them (the Parquet reader skips whole row groups).
type Skipper interface {
	// SkipRows skips up to n rows and returns how many it skipped; the
	// caller reads the rest to reach row n.
	SkipRows(n int64) (int64, error)
}

// RowError is a bad row in a holdout file.
type RowError struct {
	Name string // the file
	Row  int64  // 1-based row number (for JSON Lines also the line number)
	Msg  string
}

func (e *RowError) Error() string { return fmt.Sprintf("%s: row %d: %s", e.Name, e.Row, e.Msg) }

// FormatOf names the format of a holdout or predictions file by its
// extension, case-insensitively: .parquet is FormatParquet, .jsonl and
// .ndjson are FormatJSONL, .csv is FormatCSV. Other extensions are refused.
func FormatOf(path string) (string, error) {
	switch strings.ToLower(filepath.Ext(path)) {
	case ".parquet":
		return FormatParquet, nil
	case ".jsonl", ".ndjson":
		return FormatJSONL, nil
	case ".csv":
		return FormatCSV, nil
	}
	return "", errkind.New(errkind.BadInput, "%s: unknown file type (want .parquet, .jsonl or .ndjson)", path)
}

// Open opens a holdout file, choosing the format by extension (.parquet,
// .jsonl, .ndjson, case-insensitive); other extensions are refused.
func Open(path string, opts Options) (Reader, error) {
	format, err := FormatOf(path)
	if err != nil {
		return nil, err
	}
	if format == FormatCSV {
		return nil, errkind.New(errkind.BadInput, "%s: CSV is not a holdout format (want .parquet, .jsonl or .ndjson)", path)
	}
	if opts.Name == "" {
		opts.Name = path
	}
	f, st, err := fileio.OpenRegular(path)
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("opening holdout: %w", err))
	}
	r, err := OpenReader(f, st.Size(), format, opts)
	if err != nil {
		f.Close()
		return nil, err
	}
	return &fileReader{Reader: r, f: f}, nil
}

type fileReader struct {
	Reader
	f *os.File
}

func (r *fileReader) Close() error {
	err := r.Reader.Close()
	if cerr := r.f.Close(); err == nil {
		err = cerr
	}
	return err
}

// OpenReader reads a holdout held in r (size bytes), for example a blob
// from the store. format is "parquet", "jsonl" or "ndjson"
// (case-insensitive).
func OpenReader(r io.ReaderAt, size int64, format string, opts Options) (Reader, error) {
	if opts.Name == "" {
		opts.Name = "holdout"
	}
	l, err := newLayout(opts)
	if err != nil {
		return nil, err
	}
	switch strings.ToLower(format) {
	case FormatParquet:
		return openParquet(r, size, l)
	case FormatJSONL, "ndjson":
		return newJSONL(io.NewSectionReader(r, 0, size), l), nil
	}
	return nil, errkind.New(errkind.BadInput, "%s: unknown holdout format %q (want parquet or jsonl)", opts.Name, format)
}

// Validate reads a whole holdout file and returns its bad rows, up to
// MaxErrors of them, in file order; nil means the file is good. An error
// that stops reading (an unreadable file, a schema the reader refuses) ends
// the list.
func Validate(path string, opts Options) []error {
	r, err := Open(path, opts)
	if err != nil {
		return []error{err}
	}
	defer r.Close()
	return validate(r)
}

// ValidateReader is Validate for a holdout held in r.
func ValidateReader(r io.ReaderAt, size int64, format string, opts Options) []error {
	rd, err := OpenReader(r, size, format, opts)
	if err != nil {
		return []error{err}
	}
	defer rd.Close()
	return validate(rd)
}

func validate(r Reader) []error {
	if fr, ok := r.(*fileReader); ok {
		r = fr.Reader
	}
	var errs []error
	sink := func(err error) bool {
		errs = append(errs, err)
		return len(errs) < MaxErrors
	}
	var c interface {
		collect(func(error) bool) error
	}
	switch rd := r.(type) {
	case *parquetReader:
		c = rd
	case *jsonlReader:
		c = rd
	default:
		return []error{fmt.Errorf("validate: unsupported reader %T", r)}
	}
	if err := c.collect(sink); err != nil {
		sink(err)
	}
	return errs
}

// Names of the holdout columns (and JSON fields).
const (
	colItems  = "items"
	colValues = "values"
	colLabel  = "label"
	colWeight = "weight"
	colSlice  = "slice"
	colRowID  = "row_id"
)

func reservedColumn(name string) bool {
	switch name {
	case colItems, colValues, colLabel, colWeight, colSlice, colRowID:
		return true
	}
	return false
}

// layout is what a reader needs from Options, checked.
type layout struct {
	name          string
	vocab         *Vocabulary
	dense         []model.DenseInput
	denseWhat     []string // `dense input "name"`, for errors
	denseIdx      map[string]int
	requireLabels bool
	cluster       string // the cluster column, "" for none
	everyColumn   bool
	rowPath       bool
}

func newLayout(opts Options) (*layout, error) {
	bad := func(format string, args ...any) error {
		return errkind.New(errkind.BadInput, "%s: %s", opts.Name, fmt.Sprintf(format, args...))
	}
	if opts.Spec == nil || opts.Vocab == nil {
		return nil, fmt.Errorf("%s: reading a holdout needs a spec and a vocabulary", opts.Name)
	}
	if n := len(opts.Spec.Inputs.Sparse); n != 1 {
		return nil, bad("the spec has %d sparse inputs; holdouts feed exactly one", n)
	}
	if sp := opts.Spec.Inputs.Sparse[0]; sp.Name != opts.Vocab.in.Name || sp.VocabularySize != opts.Vocab.Len() || sp.Unknown != opts.Vocab.in.Unknown {
		return nil, bad("the vocabulary was parsed for input %q (size %d, unknown %q), not the spec's %q (size %d, unknown %q)",
			opts.Vocab.in.Name, opts.Vocab.Len(), opts.Vocab.in.Unknown, sp.Name, sp.VocabularySize, sp.Unknown)
	}
	l := &layout{
		name:          opts.Name,
		vocab:         opts.Vocab,
		dense:         opts.Spec.Inputs.Dense,
		denseIdx:      make(map[string]int, len(opts.Spec.Inputs.Dense)),
		requireLabels: opts.RequireLabels,
		cluster:       opts.ClusterColumn,
		everyColumn:   opts.EveryColumn,
		rowPath:       opts.rowPath,
	}
	if l.cluster != "" && reservedColumn(l.cluster) {
		return nil, bad("the cluster column cannot be the holdout column %q", l.cluster)
	}
	for i, d := range l.dense {
		switch {
		case reservedColumn(d.Name):
			return nil, bad("dense input %q has the name of a holdout column", d.Name)
		case d.Name == l.cluster:
			return nil, bad("dense input %q is also named as the cluster column", d.Name)
		case d.Size <= 0:
			return nil, bad("dense input %q has size %d", d.Name, d.Size)
		}
		if _, dup := l.denseIdx[d.Name]; dup {
			return nil, bad("dense input %q is named twice in the spec", d.Name)
		}
		l.denseIdx[d.Name] = i
		l.denseWhat = append(l.denseWhat, fmt.Sprintf("dense input %q", d.Name))
	}
	return l, nil
}

// rowError makes the error for a bad 1-based row.
func (l *layout) rowError(row int64, format string, args ...any) error {
	return errkind.Wrap(errkind.BadInput, &RowError{Name: l.name, Row: row, Msg: fmt.Sprintf(format, args...)})
}

// fileError makes the error for a problem with the whole file.
func (l *layout) fileError(format string, args ...any) error {
	return errkind.New(errkind.BadInput, "%s: %s", l.name, fmt.Sprintf(format, args...))
}

// scratch is one row as decoded from either format, before it is checked
// and appended to a Frame.
type scratch struct {
	itemsSet  bool
	nItems    int     // items in the file's row, dropped ones included
	idx       []int32 // mapped ids, -1 for a dropped pair
	valuesSet bool
	vals      []float32
	dense     [][]float32 // by dense input, spec order
	denseSet  []bool
	hasLabel  bool
	label     float32
	hasWeight bool
	weight    float32
	slice     string
	hasRowID  bool
	rowID     int64
	hasClust  bool
	cluster   uint64
}

func (s *scratch) reset(nDense int) {
	s.itemsSet, s.valuesSet = false, false
	s.nItems = 0
	s.idx = s.idx[:0]
	s.vals = s.vals[:0]
	if len(s.dense) != nDense {
		s.dense = make([][]float32, nDense)
		s.denseSet = make([]bool, nDense)
	}
	for i := range s.dense {
		s.dense[i] = s.dense[i][:0]
		s.denseSet[i] = false
	}
	s.hasLabel, s.hasWeight, s.hasRowID, s.hasClust = false, false, false, false
	s.slice = ""
}

// valueProblem says what is wrong with a sparse value, or "".
func valueProblem(v float32) string {
	switch {
	case v != v:
		return "is NaN"
	case math.IsInf(float64(v), 0):
		return "is infinite or beyond float32 range"
	case v < 0:
		return "is negative"
	}
	return ""
}

// checkLabel converts a label read as a number.
func checkLabel(v float64) (float32, string) {
	switch v {
	case 0:
		return 0, "" // also -0
	case 1:
		return 1, ""
	}
	return 0, fmt.Sprintf("label %v is not 0 or 1", v)
}

// checkWeight converts a weight read as a number.
func checkWeight(v float64) (float32, string) {
	w := float32(v)
	switch {
	case v != v || math.IsInf(float64(w), 0):
		return 0, fmt.Sprintf("weight %v is not finite (or beyond float32 range)", v)
	case v < 0:
		return 0, fmt.Sprintf("weight %v is negative", v)
	}
	return w, ""
}

// appendRow checks s and appends it to f as row number row (0-based in the
// file). hasLabels says whether the file has labels. On error f is left as
// it was.
func (l *layout) appendRow(f *Frame, s *scratch, row int64, hasLabels bool) error {
	if err := l.checkRow(s, row, int64(len(f.Indices)), hasLabels); err != nil {
		return err
	}
	if len(f.Indptr) == 0 {
		f.Indptr = append(f.Indptr, 0)
	}
	for i, ix := range s.idx {
		if ix >= 0 {
			f.Indices = append(f.Indices, ix)
			f.Values = append(f.Values, s.vals[i])
		}
	}
	f.Indptr = append(f.Indptr, int32(len(f.Indices)))
	if len(l.dense) > 0 && f.Dense == nil {
		f.Dense = make(map[string][]float32, len(l.dense))
	}
	for i, d := range l.dense {
		f.Dense[d.Name] = append(f.Dense[d.Name], s.dense[i]...)
	}
	if hasLabels {
		f.Labels = append(f.Labels, s.label)
	}
	w := float32(1)
	if s.hasWeight {
		w = s.weight
	}
	f.Weights = append(f.Weights, w)
	f.Slices = append(f.Slices, s.slice)
	id := row
	if s.hasRowID {
		id = s.rowID
	}
	f.RowIDs = append(f.RowIDs, id)
	if l.cluster != "" {
		f.Clusters = append(f.Clusters, s.cluster)
	}
	return nil
}

// checkRow checks s as row number row (0-based in the file) of a batch
// that holds pairs sparse pairs before it.
func (l *layout) checkRow(s *scratch, row int64, pairs int64, hasLabels bool) error {
	bad := func(format string, args ...any) error { return l.rowError(row+1, format, args...) }
	switch {
	case !s.itemsSet:
		return bad("items missing")
	case !s.valuesSet:
		return bad("values missing")
	case s.nItems != len(s.vals):
		return bad("items has %d ids but values has %d numbers", s.nItems, len(s.vals))
	}
	for i, v := range s.vals {
		if p := valueProblem(v); p != "" {
			return bad("values[%d] %s", i, p)
		}
	}
	for i, d := range l.dense {
		if !s.denseSet[i] {
			return bad("dense input %q missing", d.Name)
		}
		if n := len(s.dense[i]); n != d.Size {
			return bad("dense input %q has %d numbers, want %d", d.Name, n, d.Size)
		}
		for j, v := range s.dense[i] {
			if v != v || math.IsInf(float64(v), 0) {
				return bad("dense input %q [%d] is not finite (or beyond float32 range)", d.Name, j)
			}
		}
	}
	if hasLabels && !s.hasLabel {
		return bad("label missing")
	}
	if l.cluster != "" && !s.hasClust {
		return bad("cluster column %q missing or null", l.cluster)
	}
	if !hasLabels && s.hasLabel {
		return bad("label present, but the file's first row has none")
	}
	if pairs+int64(len(s.idx)) > math.MaxInt32 {
		return bad("batch holds more than %d pairs; read smaller batches", math.MaxInt32)
	}
	return nil
}

// interner keeps one copy of each slice name, so that the few distinct
// slices of a holdout cost no allocation per row.
type interner struct {
	m      map[string]string
	recent [4]string // the last names returned, compared before the map
	next   int
}

const maxInterned = 4096

func (in *interner) get(b []byte) string {
	if len(b) == 0 {
		return ""
	}
	for _, s := range in.recent {
		if s == string(b) {
			return s
		}
	}
	s, ok := in.m[string(b)]
	if ok {
		in.recent[in.next] = s
		in.next = (in.next + 1) % len(in.recent)
		return s
	}
	s = string(b)
	if in.m == nil {
		in.m = make(map[string]string)
	}
	if len(in.m) < maxInterned {
		in.m[s] = s
	}
	return s
}

var errMaxRows = errors.New("max must be positive")
