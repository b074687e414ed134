package data

import (
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/format"
)

// parquetReader reads a Parquet holdout column chunk by column chunk, page
// by page: it holds one decoded page per column it reads, never a whole row
// group or file. Columns the schema does not name are never read.
type parquetReader struct {
	l    *layout
	file *parquet.File
	r    io.ReaderAt
	size int64
	win  []byte // page header buffer of checkParquetGroup

	items, values               *column
	dense                       []*column // spec order
	label, weight, slice, rowID *column   // nil when the file has none
	cluster                     *column   // nil unless a cluster column is named
	cols                        []*column // all of the above that exist

	rowGroup  int   // index of the next row group to open
	groupLeft int64 // rows left in the open row group
	row       int64 // 0-based number of the next row
	sc        scratch
	columnar  bool    // Read decodes column by column (parquet_columnar.go)
	csc       scratch // a row of the run readColumnar checks
	denseAt   []int32 // readColumnar's position in each dense input's run
	slices    interner
	num       []byte // scratch for an integer cluster value's text
	done      bool
	err       error // sticky
}

func openParquet(r io.ReaderAt, size int64, l *layout) (*parquetReader, error) {
	if err := checkParquetFooter(r, size); err != nil {
		return nil, l.fileError("not a readable Parquet file: %v", err)
	}
	file, err := parquet.OpenFile(r, size,
		parquet.SkipPageIndex(true),
		parquet.SkipBloomFilters(true),
		parquet.ReadBufferSize(64<<10),
	)
	if err != nil {
		return nil, l.fileError("not a readable Parquet file: %v", err)
	}
	p := &parquetReader{l: l, file: file, r: r, size: size}
	root := file.Root()
	if l.everyColumn {
		for _, c := range root.Columns() {
			if err := checkNesting(c); err != nil {
				return nil, l.fileError("%v", err)
			}
		}
	}
	find := func(name string, want shape, kinds kindSet, required bool) (*column, error) {
		c := root.Column(name)
		if c == nil {
			if required {
				return nil, l.fileError("no %q column", name)
			}
			return nil, nil
		}
		col, err := newColumn(name, c, want, kinds)
		if err != nil {
			return nil, l.fileError("%v", err)
		}
		p.cols = append(p.cols, col)
		return col, nil
	}
	if p.items, err = find(colItems, shapeList, idKinds, true); err != nil {
		return nil, err
	}
	if p.values, err = find(colValues, shapeList, numberKinds, true); err != nil {
		return nil, err
	}
	for _, d := range l.dense {
		want := shapeList
		if d.Size == 1 {
			want = shapeListOrScalar
		}
		c, err := find(d.Name, want, numberKinds, false)
		if err != nil {
			return nil, err
		}
		if c == nil {
			return nil, l.fileError("no column for dense input %q", d.Name)
		}
		p.dense = append(p.dense, c)
	}
	if p.label, err = find(colLabel, shapeScalar, labelKinds, l.requireLabels); err != nil {
		return nil, err
	}
	if p.weight, err = find(colWeight, shapeScalar, numberKinds, false); err != nil {
		return nil, err
	}
	if p.slice, err = find(colSlice, shapeScalar, stringKinds, false); err != nil {
		return nil, err
	}
	if p.rowID, err = find(colRowID, shapeScalar, intKinds, false); err != nil {
		return nil, err
	}
	if l.cluster != "" {
		if p.cluster, err = find(l.cluster, shapeScalar, intKinds|stringKinds, true); err != nil {
			return nil, err
		}
	}
	p.setRoles()
	return p, nil
}

func (p *parquetReader) Rows() int64 { return p.file.NumRows() }

func (p *parquetReader) Close() error {
	for _, c := range p.cols {
		c.close()
	}
	return nil
}

func (p *parquetReader) Read(f *Frame, max int) (int, error) {
	f.Reset()
	f.HasLabels = p.label != nil
	if p.err != nil {
		return 0, p.err
	}
	if max <= 0 {
		return 0, errMaxRows
	}
	if p.columnar {
		n, err := p.readColumnar(f, max)
		if err != nil && err != io.EOF {
			p.err = err
		}
		return n, err
	}
	n := 0
	for n < max {
		ok, err := p.next()
		if err == nil && ok {
			err = p.l.appendRow(f, &p.sc, p.row, p.label != nil)
		}
		if err != nil {
			p.err = err
			return 0, err
		}
		if !ok {
			break
		}
		p.row++
		n++
	}
	if n == 0 {
		return 0, io.EOF
	}
	return n, nil
}

// SkipRows moves past up to n rows when they fill whole row groups,
// without reading those row groups (a reader over a ranged blob then
// fetches none of their bytes). It returns how many rows it skipped; the
// caller reads the rest. Rows keep their numbers (RowIDs without a row_id
// column, row numbers in errors).
func (p *parquetReader) SkipRows(n int64) (int64, error) {
	if p.err != nil {
		return 0, p.err
	}
	if p.groupLeft != 0 || p.done {
		return 0, nil
	}
	groups := p.file.RowGroups()
	var skipped int64
	for p.rowGroup < len(groups) && groups[p.rowGroup].NumRows() <= n-skipped {
		if p.rowGroup > 0 {
			// The row group read last must end where its rows end (a
			// closed column, after the first skip, has nothing left).
			for _, c := range p.cols {
				if err := c.endChunk(); err != nil {
					p.err = p.l.fileError("row group %d: %v", p.rowGroup, err)
					return skipped, p.err
				}
				c.close()
			}
		}
		rows := groups[p.rowGroup].NumRows()
		skipped += rows
		p.row += rows
		p.rowGroup++
	}
	return skipped, nil
}

// collect reads every row, giving each bad row's error to sink until sink
// returns false; it returns an error that stops reading. It reads column
// by column; a row group with a bad row is read again from its start row
// by row (collectGroup), the way that goes on past bad rows, so the errors
// are the row path's.
func (p *parquetReader) collect(sink func(error) bool) error {
	if !p.columnar {
		for {
			if p.groupLeft == 0 {
				ok, err := p.openGroup()
				if err != nil {
					return err
				}
				if !ok {
					return nil
				}
			}
			if more, err := p.collectGroup(sink); !more || err != nil {
				return err
			}
		}
	}
	var f Frame
	for {
		_, err := p.readColumnar(&f, collectBatch)
		if err == io.EOF {
			return nil
		}
		var re *RowError
		if err != nil && !errors.As(err, &re) {
			return err
		}
		if err == nil {
			continue
		}
		// Again from the start of the row group, row by row.
		g := p.rowGroup - 1
		chunks := p.file.RowGroups()[g].ColumnChunks()
		for _, c := range p.cols {
			c.open(chunks[c.index])
			c.columnar = false
		}
		rows := p.file.RowGroups()[g].NumRows()
		p.row -= rows - p.groupLeft
		p.groupLeft = rows
		if more, err := p.collectGroup(sink); !more || err != nil {
			return err
		}
	}
}

// collectBatch is the most rows collect reads at once (a variable for
// tests).
var collectBatch = 4096

// collectGroup reads the rest of the open row group row by row, giving
// each bad row's error to sink; false when sink wants no more.
func (p *parquetReader) collectGroup(sink func(error) bool) (bool, error) {
	var f Frame
	f.HasLabels = p.label != nil
	for p.groupLeft > 0 {
		_, err := p.next()
		if err != nil {
			var re *RowError
			if !errors.As(err, &re) {
				return false, err
			}
		} else {
			err = p.l.appendRow(&f, &p.sc, p.row, p.label != nil)
		}
		if err != nil && !sink(err) {
			return false, nil
		}
		p.row++
		f.Reset()
	}
	return true, nil
}

// next decodes the next row into p.sc. It returns false at the end of the
// file. A bad row is reported as a RowError after all columns moved past it.
func (p *parquetReader) next() (bool, error) {
	for p.groupLeft == 0 {
		if ok, err := p.openGroup(); !ok || err != nil {
			return false, err
		}
	}
	s := &p.sc
	s.reset(len(p.dense))
	var problem string // the first problem found in the row
	note := func(msg string, args ...any) {
		if problem == "" {
			problem = fmt.Sprintf(msg, args...)
		}
	}
	vocab := p.l.vocab

	rowVals, err := p.items.next()
	if err != nil {
		return false, p.corrupt(p.items, err)
	}
	if n := p.items.listLen(rowVals); n < 0 {
		note("items is null")
	} else {
		s.itemsSet = true
		s.nItems = n
		for i, v := range rowVals[:n] {
			if v.DefinitionLevel() < p.items.maxDef {
				note("items[%d] is null", i)
				break
			}
			var (
				ix   int32
				keep bool
				err  error
			)
			if v.Kind() == parquet.ByteArray {
				id := v.ByteArray()
				if len(id) == 0 {
					note("items[%d] is an empty id", i)
					break
				}
				ix, keep, err = vocab.mapBytes(id)
			} else {
				n, ok := p.items.int(v)
				if !ok {
					note("items[%d] is beyond the int64 range", i)
					break
				}
				ix, keep, err = vocab.mapInt(n)
			}
			if err != nil {
				note("items[%d]: %v", i, err)
				break
			}
			if !keep {
				ix = -1
			}
			s.idx = append(s.idx, ix)
		}
	}

	if rowVals, err = p.values.next(); err != nil {
		return false, p.corrupt(p.values, err)
	}
	if n := p.values.listLen(rowVals); n < 0 {
		note("values is null")
	} else {
		s.valuesSet = true
		for i, v := range rowVals[:n] {
			if v.DefinitionLevel() < p.values.maxDef {
				note("values[%d] is null", i)
				break
			}
			s.vals = append(s.vals, float32(p.values.float(v)))
		}
	}

	for i, c := range p.dense {
		if rowVals, err = c.next(); err != nil {
			return false, p.corrupt(c, err)
		}
		n := c.listLen(rowVals)
		if n < 0 {
			note("dense input %q is null", c.name)
			continue
		}
		s.denseSet[i] = true
		for j, v := range rowVals[:n] {
			if v.DefinitionLevel() < c.maxDef {
				note("dense input %q [%d] is null", c.name, j)
				break
			}
			s.dense[i] = append(s.dense[i], float32(c.float(v)))
		}
	}

	if c := p.label; c != nil {
		if rowVals, err = c.next(); err != nil {
			return false, p.corrupt(c, err)
		}
		if v, ok := c.scalar(rowVals); !ok {
			note("label is null")
		} else if lab, msg := checkLabel(c.float(v)); msg != "" {
			note("%s", msg)
		} else {
			s.hasLabel, s.label = true, lab
		}
	}
	if c := p.weight; c != nil {
		if rowVals, err = c.next(); err != nil {
			return false, p.corrupt(c, err)
		}
		if v, ok := c.scalar(rowVals); ok {
			if w, msg := checkWeight(c.float(v)); msg != "" {
				note("%s", msg)
			} else {
				s.hasWeight, s.weight = true, w
			}
		}
	}
	if c := p.slice; c != nil {
		if rowVals, err = c.next(); err != nil {
			return false, p.corrupt(c, err)
		}
		if v, ok := c.scalar(rowVals); ok {
			s.slice = p.slices.get(v.ByteArray())
		}
	}
	if c := p.rowID; c != nil {
		if rowVals, err = c.next(); err != nil {
			return false, p.corrupt(c, err)
		}
		if v, ok := c.scalar(rowVals); ok {
			if id, ok := c.int(v); ok {
				s.hasRowID, s.rowID = true, id
			} else {
				note("row_id is beyond the int64 range")
			}
		}
	}
	if c := p.cluster; c != nil {
		if rowVals, err = c.next(); err != nil {
			return false, p.corrupt(c, err)
		}
		if v, ok := c.scalar(rowVals); ok {
			if id, isInt := c.int(v); isInt {
				s.hasClust, s.cluster = true, ClusterKey(strconv.AppendInt(p.num[:0], id, 10))
			} else if v.Kind() == parquet.ByteArray {
				s.hasClust, s.cluster = true, ClusterKey(v.ByteArray())
			} else {
				note("%s is beyond the int64 range", c.name)
			}
		}
	}
	p.groupLeft--
	if problem != "" {
		return true, p.l.rowError(p.row+1, "%s", problem)
	}
	return true, nil
}

// openGroup checks that the row group read last ended where its rows end
// and opens the next one. It returns false at the end of the file.
func (p *parquetReader) openGroup() (bool, error) {
	if p.done {
		return false, nil
	}
	groups := p.file.RowGroups()
	if p.rowGroup > 0 {
		for _, c := range p.cols {
			if err := c.endChunk(); err != nil {
				return false, p.l.fileError("row group %d: %v", p.rowGroup, err)
			}
			c.columnar = p.columnar // after a row group collect read row by row
		}
	}
	if p.rowGroup >= len(groups) {
		p.done = true
		for _, c := range p.cols {
			c.close()
		}
		return false, nil
	}
	var err error
	if p.win, err = checkParquetGroup(p.r, p.size, p.file, p.rowGroup, p.cols, p.win); err != nil {
		return false, p.l.fileError("row group %d of %d: %v", p.rowGroup+1, len(groups), err)
	}
	g := groups[p.rowGroup]
	chunks := g.ColumnChunks()
	for _, c := range p.cols {
		c.open(chunks[c.index])
	}
	p.groupLeft = g.NumRows()
	p.rowGroup++
	return true, nil
}

func (p *parquetReader) corrupt(c *column, err error) error {
	if errors.Is(err, io.EOF) {
		err = errors.New("ends before the row group does")
	}
	return p.l.fileError("row %d: column %q: %v", p.row+1, c.name, err)
}

// checkNesting refuses a top-level column that is neither a single value
// nor a list of values (newColumn's shapes, whatever the value type): a
// group of several fields (a struct, a map's key and value, a list of
// structs) or a list of lists.
func checkNesting(c *parquet.Column) error {
	name, repeats := c.Name(), 0
	for {
		if c.Repeated() {
			repeats++
		}
		if c.Leaf() {
			break
		}
		children := c.Columns()
		if len(children) != 1 {
			what := "a struct"
			if repeats > 0 {
				what = "a map or a list of structs"
			}
			return fmt.Errorf("column %q is %s (a group of %d fields); a holdout column is a single value or a list of values", name, what, len(children))
		}
		c = children[0]
	}
	if repeats > 1 {
		return fmt.Errorf("column %q is a nested list; a holdout column is a single value or a list of values", name)
	}
	return nil
}

// shape is how a column's values are nested.
type shape int

const (
	shapeScalar shape = iota + 1
	shapeList
	shapeListOrScalar
)

type kindSet int

const (
	kindBool kindSet = 1 << iota
	kindInt
	kindFloat
	kindString
)

const (
	idKinds     = kindString | kindInt
	numberKinds = kindInt | kindFloat
	labelKinds  = kindBool | kindInt | kindFloat
	intKinds    = kindInt
	stringKinds = kindString
)

// column is a cursor over one leaf column of the open row group.
type column struct {
	name     string // the top-level field
	index    int    // leaf column index in the file
	list     bool
	repDef   int // definition level at which a list element exists
	maxDef   int
	unsigned bool

	role     colRole
	kind     parquet.Kind // the leaf's physical type
	columnar bool         // read with readRows, not next

	pages parquet.Pages
	page  parquet.Page
	vals  parquet.ValueReader
	cur   colPage // the page's levels and values, read column by column
	dict  parquet.Dictionary
	dmap  []int32 // colPage.dmap of dict, for the chunk
	seg   colSegment
	buf   []parquet.Value
	pos   int
	n     int
	row   []parquet.Value // a row gathered across buffer refills
}

// newColumn checks the top-level field c against the wanted shape and
// kinds: a chain of single-child groups ending in one leaf, with at most one
// repeated node (a list).
func newColumn(name string, c *parquet.Column, want shape, kinds kindSet) (*column, error) {
	col := &column{name: name}
	def, repeats := 0, 0
	for {
		if c.Optional() || c.Repeated() {
			def++
		}
		if c.Repeated() {
			repeats++
			col.repDef = def
		}
		if c.Leaf() {
			break
		}
		children := c.Columns()
		if len(children) != 1 {
			return nil, fmt.Errorf("column %q is a group of %d fields, want a single value or a list of values", name, len(children))
		}
		c = children[0]
	}
	col.index = c.Index()
	col.kind = c.Type().Kind()
	col.maxDef = c.MaxDefinitionLevel()
	if def != col.maxDef || c.MaxRepetitionLevel() != repeats {
		return nil, fmt.Errorf("column %q has unexpected nesting levels", name)
	}
	switch {
	case repeats > 1:
		return nil, fmt.Errorf("column %q is a nested list, want a list of values", name)
	case repeats == 1 && want == shapeScalar:
		return nil, fmt.Errorf("column %q is a list, want a single value", name)
	case repeats == 0 && want == shapeList:
		return nil, fmt.Errorf("column %q is a single value, want a list", name)
	}
	col.list = repeats == 1

	typ := c.Type()
	var lt format.LogicalTypeValue
	if t := typ.LogicalType(); t != nil {
		lt = t.Value
	}
	got := kindSet(0)
	switch typ.Kind() {
	case parquet.Boolean:
		if lt == nil {
			got = kindBool
		}
	case parquet.Int32, parquet.Int64:
		switch it := lt.(type) {
		case nil:
			got = kindInt
		case *format.IntType:
			got = kindInt
			col.unsigned = !it.IsSigned
		}
	case parquet.Float, parquet.Double:
		if lt == nil {
			got = kindFloat
		}
	case parquet.ByteArray:
		switch lt.(type) {
		case nil, *format.StringType, *format.EnumType:
			got = kindString
		}
	}
	if got&kinds == 0 {
		return nil, fmt.Errorf("column %q has values of type %s, want %s", name, typ, kinds)
	}
	col.buf = make([]parquet.Value, 1024)
	return col, nil
}

func (k kindSet) String() string {
	var s []string
	for _, e := range []struct {
		k    kindSet
		name string
	}{{kindBool, "boolean"}, {kindInt, "integer"}, {kindFloat, "float or double"}, {kindString, "string"}} {
		if k&e.k != 0 {
			s = append(s, e.name)
		}
	}
	switch len(s) {
	case 0:
		return "nothing"
	case 1:
		return s[0]
	}
	out := s[0]
	for _, x := range s[1 : len(s)-1] {
		out += ", " + x
	}
	return out + " or " + s[len(s)-1]
}

// open starts reading the column's chunk of a new row group.
func (c *column) open(chunk parquet.ColumnChunk) {
	c.close()
	c.pages = chunk.Pages()
	c.dict, c.dmap = nil, c.dmap[:0]
}

func (c *column) close() {
	c.releasePage()
	if c.pages != nil {
		c.pages.Close()
		c.pages = nil
	}
	c.pos, c.n = 0, 0
}

func (c *column) releasePage() {
	if c.page != nil {
		parquet.Release(c.page)
		c.page, c.vals = nil, nil
	}
	c.cur = colPage{}
}

// fill refills buf from the current page or the next ones; io.EOF at the
// end of the chunk.
func (c *column) fill() error {
	for {
		if c.vals != nil {
			n, err := c.vals.ReadValues(c.buf)
			if n > 0 {
				c.pos, c.n = 0, n
				return nil
			}
			if err != nil && err != io.EOF {
				return err
			}
			// The page is spent. Values of a row that began on it must
			// outlive it.
			for i := range c.row {
				c.row[i] = c.row[i].Clone()
			}
			c.releasePage()
		}
		if c.pages == nil {
			return io.EOF
		}
		page, err := c.pages.ReadPage()
		if err != nil {
			return err
		}
		c.page, c.vals = page, page.Values()
	}
}

// next returns the values of the next row: one value for a scalar column,
// one per element (or a single null one for an empty or null list) for a
// list. The slice is valid until the next call.
func (c *column) next() ([]parquet.Value, error) {
	c.row = c.row[:0]
	if c.pos == c.n {
		if err := c.fill(); err != nil {
			return nil, err
		}
	}
	if c.buf[c.pos].RepetitionLevel() != 0 {
		return nil, errors.New("a row does not start where the previous one ends")
	}
	start := c.pos
	c.pos++
	if !c.list {
		return c.buf[start:c.pos], nil
	}
	for {
		for c.pos < c.n && c.buf[c.pos].RepetitionLevel() != 0 {
			c.pos++
		}
		if c.pos < c.n {
			if len(c.row) == 0 {
				return c.buf[start:c.pos], nil
			}
			c.row = append(c.row, c.buf[start:c.pos]...)
			return c.row, nil
		}
		// The row may go on past the buffer.
		c.row = append(c.row, c.buf[start:c.pos]...)
		if err := c.fill(); err != nil {
			if err == io.EOF {
				return c.row, nil
			}
			return nil, err
		}
		start = 0
	}
}

// endChunk checks that the chunk has no values left.
func (c *column) endChunk() error {
	left, next := c.pos < c.n, c.fill
	if c.columnar {
		left, next = c.cur.lp < c.cur.n, c.loadPage
	}
	if left {
		return fmt.Errorf("column %q has more values than rows", c.name)
	}
	switch err := next(); err {
	case nil:
		return fmt.Errorf("column %q has more values than rows", c.name)
	case io.EOF:
		return nil
	default:
		return fmt.Errorf("column %q: %w", c.name, err)
	}
}

// listLen is the number of elements of a list row, or -1 when the list
// is null.
func (c *column) listLen(row []parquet.Value) int {
	if !c.list {
		if row[0].DefinitionLevel() < c.maxDef {
			return -1
		}
		return 1 // a scalar taken as a list of one
	}
	if len(row) == 1 {
		if d := row[0].DefinitionLevel(); d < c.repDef {
			if d == c.repDef-1 {
				return 0
			}
			return -1
		}
	}
	return len(row)
}

// scalar returns a scalar row's value, false when it is null.
func (c *column) scalar(row []parquet.Value) (parquet.Value, bool) {
	v := row[0]
	return v, v.DefinitionLevel() == c.maxDef
}

// float reads a non-null number as float64.
func (c *column) float(v parquet.Value) float64 {
	switch v.Kind() {
	case parquet.Float:
		return float64(v.Float())
	case parquet.Double:
		return v.Double()
	case parquet.Int32:
		if c.unsigned {
			return float64(v.Uint32())
		}
		return float64(v.Int32())
	case parquet.Int64:
		if c.unsigned {
			return float64(v.Uint64())
		}
		return float64(v.Int64())
	case parquet.Boolean:
		if v.Boolean() {
			return 1
		}
		return 0
	}
	return math.NaN()
}

// int reads a non-null integer; false when it does not fit an int64.
func (c *column) int(v parquet.Value) (int64, bool) {
	switch v.Kind() {
	case parquet.Int32:
		if c.unsigned {
			return int64(v.Uint32()), true
		}
		return int64(v.Int32()), true
	case parquet.Int64:
		if c.unsigned {
			u := v.Uint64()
			return int64(u), u <= math.MaxInt64
		}
		return v.Int64(), true
	}
	return 0, false
}

var _ Reader = (*parquetReader)(nil)
