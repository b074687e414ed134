package data

import (
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"math/bits"
	"strconv"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/encoding"
)

// Reading column by column. Read decodes a run of rows (up to the batch
// size, within one row group) one column at a time, straight from each
// page's levels and typed values (no parquet.Value per value), then checks
// the rows in file order exactly as the row path does (the same problems
// in the same order, the same messages and row numbers) and appends the
// run to the frame column by column. The row path (next) stays for
// Validate, which goes on past bad rows, and for tests to compare against.

// colRole is what a column feeds.
type colRole int

const (
	roleItems colRole = iota + 1
	roleValues
	roleDense
	roleLabel
	roleWeight
	roleSlice
	roleRowID
	roleCluster
)

func (p *parquetReader) setRoles() {
	p.items.role, p.values.role = roleItems, roleValues
	for _, c := range p.dense {
		c.role = roleDense
	}
	for c, r := range map[*column]colRole{p.label: roleLabel, p.weight: roleWeight, p.slice: roleSlice, p.rowID: roleRowID, p.cluster: roleCluster} {
		if c != nil {
			c.role = r
		}
	}
	p.setColumnar(!p.l.rowPath)
}

// setColumnar chooses how the columns are read; only before any row is.
func (p *parquetReader) setColumnar(on bool) {
	p.columnar = on
	for _, c := range p.cols {
		c.columnar = on
	}
}

// colPage is a column's open page: its levels and its non-null values.
type colPage struct {
	rep, def []byte // nil when the column has no such levels
	n        int    // levels (values, nulls included) in the page
	lp, dp   int    // next level, next non-null value
	// The values, by physical type; idx holds dictionary indexes into
	// them when the page is dictionary-encoded.
	bits []byte // booleans, one bit each from the lowest
	i32  []int32
	i64  []int64
	f32  []float32
	f64  []float64
	ba   []byte
	off  []uint32
	idx  []int32
	nv   int // values held (the dictionary's length for indexed pages)
	// dmap is, for items of an indexed page, each dictionary entry's
	// weight row plus 2, 1 for a dropped id, 0 while not yet mapped.
	dmap []int32
}

// colSegment is one column's decoded run of rows.
type colSegment struct {
	cnt []int32   // per row: elements (1 for a scalar), -1 for a null
	ix  []int32   // items: weight rows, -1 for a dropped pair
	fv  []float32 // values and dense inputs: elements; label and weight: one per row
	i64 []int64   // row_id: one per row
	str []string  // slice: one per row
	key []uint64  // cluster: one per row
	// bad is the first row of the run with a problem (msg) or a fault
	// (err, which wins: the row path stops on it); -1 for none. Decoding
	// stops there.
	bad     int
	msg     string
	err     error
	dropped bool // an item was dropped
}

// setPage takes page's levels and values.
func (c *column) setPage(page parquet.Page) error {
	pg := colPage{n: int(page.NumValues())}
	if c.maxDef > 0 {
		pg.def = page.DefinitionLevels()
		if len(pg.def) != pg.n {
			return fmt.Errorf("a page has %d definition levels for %d values", len(pg.def), pg.n)
		}
	}
	if c.list {
		pg.rep = page.RepetitionLevels()
		if len(pg.rep) != pg.n {
			return fmt.Errorf("a page has %d repetition levels for %d values", len(pg.rep), pg.n)
		}
	}
	nonNull := pg.n
	if pg.def != nil {
		nonNull = countEqual(pg.def, byte(c.maxDef))
	}
	data := page.Data()
	if dict := page.Dictionary(); dict != nil {
		if data.Kind() != encoding.Int32 {
			return errors.New("a dictionary page's indexes are not integers")
		}
		pg.idx = data.Int32()
		if len(pg.idx) < nonNull {
			return fmt.Errorf("a page has %d values for %d non-null levels", len(pg.idx), nonNull)
		}
		data = dict.Page().Data()
	}
	var n int
	switch c.kind {
	case parquet.Boolean:
		if data.Kind() == encoding.Boolean {
			pg.bits = data.Boolean()
			n = 8 * len(pg.bits)
		}
	case parquet.Int32:
		if data.Kind() == encoding.Int32 {
			pg.i32 = data.Int32()
			n = len(pg.i32)
		}
	case parquet.Int64:
		if data.Kind() == encoding.Int64 {
			pg.i64 = data.Int64()
			n = len(pg.i64)
		}
	case parquet.Float:
		if data.Kind() == encoding.Float {
			pg.f32 = data.Float()
			n = len(pg.f32)
		}
	case parquet.Double:
		if data.Kind() == encoding.Double {
			pg.f64 = data.Double()
			n = len(pg.f64)
		}
	case parquet.ByteArray:
		if data.Kind() == encoding.ByteArray {
			pg.ba, pg.off = data.ByteArray()
			n = max(len(pg.off)-1, 0)
			for i := 0; i < n; i++ {
				if pg.off[i] > pg.off[i+1] || int(pg.off[i+1]) > len(pg.ba) {
					return errors.New("a page's byte array offsets are out of order")
				}
			}
		}
	default:
		return fmt.Errorf("values of type %s", c.kind)
	}
	pg.nv = n
	if pg.idx == nil && n < nonNull {
		return fmt.Errorf("a page has %d values for %d non-null levels", n, nonNull)
	}
	if pg.idx != nil && c.role == roleItems {
		if dict := page.Dictionary(); dict != c.dict || len(c.dmap) != n {
			c.dict = dict
			c.dmap = append(c.dmap[:0], make([]int32, n)...)
		}
		pg.dmap = c.dmap
	}
	c.cur = pg
	return nil
}

// at maps the page's j-th non-null value to its position in the values,
// false when a dictionary index is out of range.
func (pg *colPage) at(j int) (int, bool) {
	if pg.idx == nil {
		return j, true
	}
	k := int(pg.idx[j])
	return k, k >= 0 && k < pg.nv
}

// loadPage opens the chunk's next page that has values; io.EOF at the end
// of the chunk.
func (c *column) loadPage() error {
	for {
		c.releasePage()
		if c.pages == nil {
			return io.EOF
		}
		page, err := c.pages.ReadPage()
		if err != nil {
			return err
		}
		c.page = page
		if err := c.setPage(page); err != nil {
			return err
		}
		if c.cur.n > 0 {
			return nil
		}
	}
}

// readColumnar is Read, column by column.
func (p *parquetReader) readColumnar(f *Frame, max int) (int, error) {
	n := 0
	for n < max {
		if p.groupLeft == 0 {
			ok, err := p.openGroup()
			if err != nil {
				return 0, err
			}
			if !ok {
				break
			}
			continue
		}
		k := int(min(int64(max-n), p.groupLeft))
		for _, c := range p.cols {
			p.readRows(c, k)
		}
		if err := p.checkRun(f, k); err != nil {
			return 0, err
		}
		p.appendRun(f, k)
		p.row += int64(k)
		p.groupLeft -= int64(k)
		n += k
	}
	if n == 0 {
		return 0, io.EOF
	}
	return n, nil
}

// readRows decodes the next k rows of column c into c.seg, stopping at the
// first row with a problem or a fault. Runs of plain rows that lie whole
// in the open page go through fastList and fastScalar; any other row
// (a null, a problem, a row at the end of a page) through readRow.
func (p *parquetReader) readRows(c *column, k int) {
	s := &c.seg
	s.cnt, s.ix, s.fv, s.i64, s.str, s.key = s.cnt[:0], s.ix[:0], s.fv[:0], s.i64[:0], s.str[:0], s.key[:0]
	s.bad, s.msg, s.err, s.dropped = -1, "", nil, false
	pg := &c.cur
	for r := 0; r < k; {
		if pg.lp == pg.n {
			if err := c.loadPage(); err != nil {
				s.bad, s.err = r, err
				return
			}
		}
		var n int
		if c.list {
			n = p.fastList(c, r, k)
		} else {
			n = p.fastScalar(c, r, k)
		}
		if r += n; r == k {
			return
		}
		if pg.lp == pg.n {
			continue
		}
		if !p.readRow(c, r) {
			return
		}
		r++
	}
}

// fastList decodes rows r0, r0+1, ... (up to k) of a list column while
// each is an empty list or a list without nulls that ends before the open
// page does, and its values pass (listValues); it returns how many. It
// finds the rows' ends a word of levels at a time.
func (p *parquetReader) fastList(c *column, r0, k int) int {
	s := &c.seg
	pg := &c.cur
	rep, def := pg.rep, pg.def
	md, empty := byte(c.maxDef), byte(c.repDef-1)
	lp := pg.lp
	if rep[lp] != 0 {
		return 0
	}
	c0 := len(s.cnt)
	var end int
	s.cnt, end = rowLengths(rep, lp, k-r0, s.cnt)
	cnt := s.cnt[c0:]
	levels, vals := end-lp, end-lp
	if !allEqual(def[lp:end], md) {
		// Some row is an empty list, or has a null: row by row.
		levels, vals = 0, 0
		for j, m := range cnt {
			at := lp + levels
			if def[at] == md && allEqual(def[at+1:at+int(m)], md) {
				levels, vals = levels+int(m), vals+int(m)
				continue
			}
			if m == 1 && def[at] == empty {
				cnt[j] = 0
				levels++
				continue
			}
			cnt = cnt[:j]
			break
		}
	}
	if got := p.listValues(c, pg, pg.dp, vals); got < vals {
		// Keep the rows before the one holding the value with a problem.
		levels, vals = 0, 0
		j := 0
		for ; vals+int(cnt[j]) <= got; j++ {
			levels += max(int(cnt[j]), 1)
			vals += int(cnt[j])
		}
		cnt = cnt[:j]
		if c.role == roleItems {
			s.ix = s.ix[:len(s.ix)-(got-vals)]
		} else {
			s.fv = s.fv[:len(s.fv)-(got-vals)]
		}
	}
	s.cnt = s.cnt[:c0+len(cnt)]
	pg.lp += levels
	pg.dp += vals
	return len(cnt)
}

// listValues takes m values of list rows from the page's non-null value
// dp on, up to the first that has a problem (readRow then finds it), and
// returns how many it took.
func (p *parquetReader) listValues(c *column, pg *colPage, dp, m int) int {
	s := &c.seg
	if c.role != roleItems {
		if pg.idx == nil && c.kind == parquet.Float {
			s.fv = append(s.fv, pg.f32[dp:dp+m]...)
			return m
		}
		for j := dp; j < dp+m; j++ {
			k, ok := pg.at(j)
			if !ok {
				return j - dp
			}
			s.fv = append(s.fv, float32(c.number(pg, k)))
		}
		return m
	}
	if pg.dmap != nil {
		return p.dictItems(c, pg, dp, m)
	}
	dropped := false
	j := dp
	for j < dp+m {
		if c.kind == parquet.ByteArray {
			// Known ids in one loop; an unknown, empty or long one
			// goes the general way below.
			var got int
			s.ix, got = p.l.vocab.index.lookupRun(p.l.vocab.ids, pg.ba, pg.off[j:dp+m+1], s.ix)
			if j += got; j == dp+m {
				break
			}
		}
		ix, keep, ok := p.mapItem(c, pg, j)
		if !ok {
			break
		}
		if !keep {
			ix, dropped = -1, true
		}
		s.ix = append(s.ix, ix)
		j++
	}
	// A dropped id of a row given back sets dropped too: appendRun then
	// only takes the slower way.
	s.dropped = s.dropped || dropped
	return j - dp
}

// dictItems is listValues for items of a dictionary-encoded page: each
// dictionary entry is mapped through the vocabulary once per column
// chunk, when first used (pg.dmap).
func (p *parquetReader) dictItems(c *column, pg *colPage, dp, m int) int {
	s := &c.seg
	dropped := false
	j := dp
	for ; j < dp+m; j++ {
		k := pg.idx[j]
		if k < 0 || int(k) >= pg.nv {
			break
		}
		e := pg.dmap[k]
		if e == 0 {
			ix, keep, ok := p.mapItem(c, pg, int(k))
			if !ok {
				break // not kept: readRow gives the problem
			}
			e = 1
			if keep {
				e = ix + 2
			}
			pg.dmap[k] = e
		}
		if e == 1 {
			dropped = true
		}
		s.ix = append(s.ix, e-2) // -1 for a dropped id
	}
	s.dropped = s.dropped || dropped
	return j - dp
}

// mapItem maps value k of an items page through the vocabulary; false
// when the id is empty, beyond the int64 range or refused (readRow then
// gives the problem).
func (p *parquetReader) mapItem(c *column, pg *colPage, k int) (ix int32, keep, ok bool) {
	var err error
	if c.kind == parquet.ByteArray {
		id := pg.ba[pg.off[k]:pg.off[k+1]]
		if len(id) == 0 {
			return 0, false, false
		}
		ix, keep, err = p.l.vocab.mapBytes(id)
	} else {
		n, ok := c.integer(pg, k)
		if !ok {
			return 0, false, false
		}
		ix, keep, err = p.l.vocab.mapInt(n)
	}
	return ix, keep, err == nil
}

// rowLengths appends to cnt the number of levels of each of up to k rows,
// the first starting at rep[start] (a zero repetition level), each ending
// where the next zero begins; a row that runs to the end of rep is not
// counted (it may go on in the next page). It returns cnt and the start of
// the first row not counted. It finds the zeros a word of levels at a time.
func rowLengths(rep []byte, start, k int, cnt []int32) ([]int32, int) {
	const lows = 0x7f7f7f7f7f7f7f7f
	end, i := start, start+1
	for ; k > 0 && i+8 <= len(rep); i += 8 {
		v := binary.LittleEndian.Uint64(rep[i:])
		// The high bit of each zero byte, exactly: (v&lows)+lows carries
		// into a byte's high bit unless its low bits are zero, and never
		// into the next byte.
		z := ^((v&lows + lows) | v | lows)
		for ; z != 0 && k > 0; z &= z - 1 {
			e := i + bits.TrailingZeros64(z)>>3
			cnt = append(cnt, int32(e-end))
			end = e
			k--
		}
	}
	for ; k > 0 && i < len(rep); i++ {
		if rep[i] == 0 {
			cnt = append(cnt, int32(i-end))
			end = i
			k--
		}
	}
	return cnt, end
}

// countEqual returns how many bytes of b are x, a word at a time.
func countEqual(b []byte, x byte) int {
	const lows, highs = 0x7f7f7f7f7f7f7f7f, 0x8080808080808080
	xs := uint64(x) * 0x0101010101010101
	n, i := 0, 0
	for ; i+8 <= len(b); i += 8 {
		v := binary.LittleEndian.Uint64(b[i:]) ^ xs
		// A byte's high bit ends up set unless the byte is zero.
		nz := ((v & lows) + lows | v) & highs
		n += 8 - bits.OnesCount64(nz)
	}
	for ; i < len(b); i++ {
		if b[i] == x {
			n++
		}
	}
	return n
}

// allEqual reports whether every byte of b is x.
func allEqual(b []byte, x byte) bool {
	xs := uint64(x) * 0x0101010101010101
	var diff uint64
	i := 0
	for ; i+8 <= len(b); i += 8 {
		diff |= binary.LittleEndian.Uint64(b[i:]) ^ xs
	}
	for ; i < len(b); i++ {
		diff |= uint64(b[i] ^ x)
	}
	return diff == 0
}

// fastScalar decodes rows r0, r0+1, ... (up to k) of a scalar column
// while they are in the open page and have no problem; it returns how
// many.
func (p *parquetReader) fastScalar(c *column, r0, k int) int {
	s := &c.seg
	pg := &c.cur
	md := byte(c.maxDef)
	lp, dp := pg.lp, pg.dp
	if m := min(k-r0, pg.n-lp); pg.idx == nil && (pg.def == nil || allEqual(pg.def[lp:lp+m], md)) {
		if n := p.plainScalars(c, pg, dp, m); n >= 0 {
			for range n {
				s.cnt = append(s.cnt, 1)
			}
			pg.lp, pg.dp = lp+n, dp+n
			return n
		}
	}
	r := r0
	for end := r0 + min(k-r0, pg.n-lp); r < end; r++ {
		if pg.def != nil && pg.def[lp] != md {
			if p.scalarNull(c, r) != "" {
				break
			}
			s.cnt = append(s.cnt, -1)
			lp++
			continue
		}
		j, ok := pg.at(dp)
		if !ok || p.scalarValue(c, pg, j, r) != "" {
			break
		}
		s.cnt = append(s.cnt, 1)
		lp, dp = lp+1, dp+1
	}
	pg.lp, pg.dp = lp, dp
	return r - r0
}

// plainScalars takes up to m non-null values of a plain (not indexed)
// page from value dp on, for the columns and types it knows, up to the
// first with a problem; it returns how many, or -1 for a column it leaves
// to fastScalar's general loop.
func (p *parquetReader) plainScalars(c *column, pg *colPage, dp, m int) int {
	s := &c.seg
	switch {
	case c.role == roleLabel && c.kind == parquet.Float:
		for i, v := range pg.f32[dp : dp+m] {
			switch v {
			case 0:
				s.fv = append(s.fv, 0) // also -0, as checkLabel
			case 1:
				s.fv = append(s.fv, 1)
			default:
				return i
			}
		}
		return m
	case c.role == roleWeight && c.kind == parquet.Float:
		for i, v := range pg.f32[dp : dp+m] {
			if !(v >= 0 && v <= math.MaxFloat32) { // checkWeight
				return i
			}
			s.fv = append(s.fv, v)
		}
		return m
	case c.role == roleRowID && c.kind == parquet.Int64 && !c.unsigned:
		s.i64 = append(s.i64, pg.i64[dp:dp+m]...)
		return m
	case c.role == roleSlice:
		for j := dp; j < dp+m; j++ {
			s.str = append(s.str, p.slices.get(pg.ba[pg.off[j]:pg.off[j+1]]))
		}
		return m
	}
	return -1
}

// readRow decodes row r (0-based in the run) of column c from the open
// page on, loading the next pages as it needs; false when the row has a
// problem or a fault (recorded in c.seg).
func (p *parquetReader) readRow(c *column, r int) bool {
	s := &c.seg
	pg := &c.cur
	md := byte(c.maxDef)
	if pg.rep != nil && pg.rep[pg.lp] != 0 {
		s.bad, s.err = r, errors.New("a row does not start where the previous one ends")
		return false
	}
	if !c.list {
		// One level: a value or a null.
		d := md
		if pg.def != nil {
			d = pg.def[pg.lp]
		}
		pg.lp++
		if d < md {
			s.cnt = append(s.cnt, -1)
			if msg := p.scalarNull(c, r); msg != "" {
				s.bad, s.msg = r, msg
				return false
			}
			return true
		}
		j, ok := pg.at(pg.dp)
		pg.dp++
		if !ok {
			s.bad, s.err = r, errors.New("a dictionary index is out of range")
			return false
		}
		s.cnt = append(s.cnt, 1)
		if msg := p.scalarValue(c, pg, j, r); msg != "" {
			s.bad, s.msg = r, msg
			return false
		}
		return true
	}
	// A list: its levels up to the next row's first.
	elems, firstNull, d0 := 0, -1, byte(0)
	msg := ""
	for {
		d := pg.def[pg.lp]
		if elems == 0 {
			d0 = d
		}
		if d == md {
			j, ok := pg.at(pg.dp)
			pg.dp++
			if !ok {
				s.bad, s.err = r, errors.New("a dictionary index is out of range")
				return false
			}
			if firstNull < 0 && msg == "" {
				msg = p.listValue(c, pg, j, elems)
			}
		} else if firstNull < 0 && msg == "" {
			firstNull = elems
		}
		pg.lp++
		elems++
		if pg.lp == pg.n {
			if err := c.loadPage(); err == io.EOF {
				break
			} else if err != nil {
				s.bad, s.err = r, err
				return false
			}
		}
		if pg.rep[pg.lp] == 0 {
			break
		}
	}
	if elems == 1 && int(d0) < c.repDef {
		// No element: an empty list, or a null one.
		if int(d0) == c.repDef-1 {
			s.cnt = append(s.cnt, 0)
			return true
		}
		s.cnt = append(s.cnt, -1)
		s.bad, s.msg = r, p.listNull(c)
		return false
	}
	if firstNull >= 0 {
		s.bad, s.msg = r, p.elemNull(c, firstNull)
		return false
	}
	if msg != "" {
		s.bad, s.msg = r, msg
		return false
	}
	s.cnt = append(s.cnt, int32(elems))
	return true
}

// number reads value j of a page of a number column as float64 (column.float).
func (c *column) number(pg *colPage, j int) float64 {
	switch c.kind {
	case parquet.Float:
		return float64(pg.f32[j])
	case parquet.Double:
		return pg.f64[j]
	case parquet.Int32:
		if c.unsigned {
			return float64(uint32(pg.i32[j]))
		}
		return float64(pg.i32[j])
	case parquet.Int64:
		if c.unsigned {
			return float64(uint64(pg.i64[j]))
		}
		return float64(pg.i64[j])
	case parquet.Boolean:
		if pg.bits[j>>3]>>(j&7)&1 != 0 {
			return 1
		}
		return 0
	}
	return math.NaN()
}

// integer reads value j of a page of an integer column (column.int).
func (c *column) integer(pg *colPage, j int) (int64, bool) {
	switch c.kind {
	case parquet.Int32:
		if c.unsigned {
			return int64(uint32(pg.i32[j])), true
		}
		return int64(pg.i32[j]), true
	case parquet.Int64:
		if c.unsigned {
			u := uint64(pg.i64[j])
			return int64(u), u <= math.MaxInt64
		}
		return pg.i64[j], true
	}
	return 0, false
}

// listValue takes element i (value j of the page) of a list row and
// returns the row path's problem with it, or "".
func (p *parquetReader) listValue(c *column, pg *colPage, j, i int) string {
	s := &c.seg
	switch c.role {
	case roleItems:
		var (
			ix   int32
			keep bool
			err  error
		)
		if c.kind == parquet.ByteArray {
			id := pg.ba[pg.off[j]:pg.off[j+1]]
			if len(id) == 0 {
				return fmt.Sprintf("items[%d] is an empty id", i)
			}
			ix, keep, err = p.l.vocab.mapBytes(id)
		} else {
			n, ok := c.integer(pg, j)
			if !ok {
				return fmt.Sprintf("items[%d] is beyond the int64 range", i)
			}
			ix, keep, err = p.l.vocab.mapInt(n)
		}
		if err != nil {
			return fmt.Sprintf("items[%d]: %v", i, err)
		}
		if !keep {
			ix = -1
			s.dropped = true
		}
		s.ix = append(s.ix, ix)
	default: // values, dense inputs
		s.fv = append(s.fv, float32(c.number(pg, j)))
	}
	return ""
}

func (p *parquetReader) listNull(c *column) string {
	switch c.role {
	case roleItems:
		return "items is null"
	case roleValues:
		return "values is null"
	}
	return fmt.Sprintf("dense input %q is null", c.name)
}

func (p *parquetReader) elemNull(c *column, i int) string {
	switch c.role {
	case roleItems:
		return fmt.Sprintf("items[%d] is null", i)
	case roleValues:
		return fmt.Sprintf("values[%d] is null", i)
	}
	return fmt.Sprintf("dense input %q [%d] is null", c.name, i)
}

// scalarNull records a null scalar of row r (0-based in the run) and
// returns the row path's problem with it, or "".
func (p *parquetReader) scalarNull(c *column, r int) string {
	s := &c.seg
	switch c.role {
	case roleDense:
		return fmt.Sprintf("dense input %q is null", c.name)
	case roleLabel:
		return "label is null"
	case roleWeight:
		s.fv = append(s.fv, 1)
	case roleSlice:
		s.str = append(s.str, "")
	case roleRowID:
		s.i64 = append(s.i64, p.row+int64(r))
	case roleCluster:
		s.key = append(s.key, 0)
	}
	return ""
}

// scalarValue takes row r's value (value j of the page) and returns the
// row path's problem with it, or "".
func (p *parquetReader) scalarValue(c *column, pg *colPage, j, r int) string {
	s := &c.seg
	switch c.role {
	case roleDense:
		s.fv = append(s.fv, float32(c.number(pg, j)))
	case roleLabel:
		lab, msg := checkLabel(c.number(pg, j))
		if msg != "" {
			return msg
		}
		s.fv = append(s.fv, lab)
	case roleWeight:
		w, msg := checkWeight(c.number(pg, j))
		if msg != "" {
			return msg
		}
		s.fv = append(s.fv, w)
	case roleSlice:
		s.str = append(s.str, p.slices.get(pg.ba[pg.off[j]:pg.off[j+1]]))
	case roleRowID:
		id, ok := c.integer(pg, j)
		if !ok {
			return "row_id is beyond the int64 range"
		}
		s.i64 = append(s.i64, id)
	case roleCluster:
		if id, ok := c.integer(pg, j); ok {
			s.key = append(s.key, ClusterKey(strconv.AppendInt(p.num[:0], id, 10)))
		} else if c.kind == parquet.ByteArray {
			s.key = append(s.key, ClusterKey(pg.ba[pg.off[j]:pg.off[j+1]]))
		} else {
			return fmt.Sprintf("%s is beyond the int64 range", c.name)
		}
	}
	return ""
}

// checkRun checks the decoded run of k rows in file order as the row path
// does: a column's fault, then the first problem by column, then the
// checks of a whole row (layout.checkRow).
func (p *parquetReader) checkRun(f *Frame, k int) error {
	bad := k
	for _, c := range p.cols {
		if c.seg.bad >= 0 && c.seg.bad < bad {
			bad = c.seg.bad
		}
	}
	if bad == k && p.runPasses(f, k) {
		return nil
	}
	s := &p.csc
	s.reset(len(p.dense))
	s.itemsSet, s.valuesSet = true, true
	for i := range s.denseSet {
		s.denseSet[i] = true
	}
	hasLabels := p.label != nil
	s.hasLabel = hasLabels
	s.hasClust = true
	pairs := int64(len(f.Indices))
	items, values := &p.items.seg, &p.values.seg
	var ia, va int32
	if len(p.denseAt) != len(p.dense) {
		p.denseAt = make([]int32, len(p.dense))
	}
	da := p.denseAt
	clear(da)
	for r := 0; r < k; r++ {
		if r == bad {
			for _, c := range p.cols {
				if c.seg.bad == r && c.seg.err != nil {
					return p.corruptAt(c, p.row+int64(r), c.seg.err)
				}
			}
			for _, c := range p.cols {
				if c.seg.bad == r {
					return p.l.rowError(p.row+int64(r)+1, "%s", c.seg.msg)
				}
			}
		}
		ni, nv := items.cnt[r], values.cnt[r]
		s.nItems = int(ni)
		s.idx = items.ix[ia : ia+ni]
		s.vals = values.fv[va : va+nv]
		ia, va = ia+ni, va+nv
		for i, c := range p.dense {
			nd := c.seg.cnt[r]
			s.dense[i] = c.seg.fv[da[i] : da[i]+nd]
			da[i] += nd
		}
		if p.cluster != nil {
			s.hasClust = p.cluster.seg.cnt[r] >= 0
		}
		if err := p.l.checkRow(s, p.row+int64(r), pairs, hasLabels); err != nil {
			return err
		}
		if items.dropped {
			for _, ix := range s.idx {
				if ix >= 0 {
					pairs++
				}
			}
		} else {
			pairs += int64(ni)
		}
	}
	return nil
}

// runPasses says whether every row of a decoded run of k rows, none of
// which had a problem while decoding, passes layout.checkRow, by checks of
// whole columns; when it does not, checkRun goes row by row to find the
// first failure and its message.
func (p *parquetReader) runPasses(f *Frame, k int) bool {
	items, values := &p.items.seg, &p.values.seg
	for r, n := range items.cnt[:k] {
		if n != values.cnt[r] {
			return false
		}
	}
	ok := true
	for _, v := range values.fv {
		ok = ok && v >= 0 && v <= math.MaxFloat32 // valueProblem
	}
	for i, c := range p.dense {
		size := int32(p.l.dense[i].Size)
		for _, n := range c.seg.cnt[:k] {
			ok = ok && n == size
		}
		for _, v := range c.seg.fv {
			ok = ok && v-v == 0 // finite
		}
	}
	if p.cluster != nil {
		for _, n := range p.cluster.seg.cnt[:k] {
			ok = ok && n >= 0
		}
	}
	return ok && int64(len(f.Indices))+int64(len(items.ix)) <= math.MaxInt32
}

func (p *parquetReader) corruptAt(c *column, row int64, err error) error {
	if errors.Is(err, io.EOF) {
		err = errors.New("ends before the row group does")
	}
	return p.l.fileError("row %d: column %q: %v", row+1, c.name, err)
}

// appendRun appends a checked run of k rows to f.
func (p *parquetReader) appendRun(f *Frame, k int) {
	if len(f.Indptr) == 0 {
		f.Indptr = append(f.Indptr, 0)
	}
	items, values := &p.items.seg, &p.values.seg
	if !items.dropped {
		f.Indices = append(f.Indices, items.ix...)
		f.Values = append(f.Values, values.fv...)
		end := f.Indptr[len(f.Indptr)-1]
		for _, n := range items.cnt[:k] {
			end += n
			f.Indptr = append(f.Indptr, end)
		}
	} else {
		a := 0
		for _, n := range items.cnt[:k] {
			for j := a; j < a+int(n); j++ {
				if ix := items.ix[j]; ix >= 0 {
					f.Indices = append(f.Indices, ix)
					f.Values = append(f.Values, values.fv[j])
				}
			}
			a += int(n)
			f.Indptr = append(f.Indptr, int32(len(f.Indices)))
		}
	}
	if len(p.dense) > 0 && f.Dense == nil {
		f.Dense = make(map[string][]float32, len(p.dense))
	}
	for i, d := range p.l.dense {
		f.Dense[d.Name] = append(f.Dense[d.Name], p.dense[i].seg.fv...)
	}
	if p.label != nil {
		f.Labels = append(f.Labels, p.label.seg.fv...)
	}
	if p.weight != nil {
		f.Weights = append(f.Weights, p.weight.seg.fv...)
	} else {
		for range k {
			f.Weights = append(f.Weights, 1)
		}
	}
	if p.slice != nil {
		f.Slices = append(f.Slices, p.slice.seg.str...)
	} else {
		for range k {
			f.Slices = append(f.Slices, "")
		}
	}
	if p.rowID != nil {
		f.RowIDs = append(f.RowIDs, p.rowID.seg.i64...)
	} else {
		for r := range k {
			f.RowIDs = append(f.RowIDs, p.row+int64(r))
		}
	}
	if p.cluster != nil {
		f.Clusters = append(f.Clusters, p.cluster.seg.key...)
	}
}
