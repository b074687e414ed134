package model

import (
	"fmt"
	"math"
	"runtime"
	"slices"
	"sync"
	"sync/atomic"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model/kernel"
)

// DefaultTileRows is the number of rows a Runner computes together unless
// told otherwise (SetTileRows): small enough that a tile's activations stay
// in a core's cache, large enough to amortise reading the weights.
const DefaultTileRows = 128

// Runner evaluates a Net on batches. It owns all scratch memory, so a Run in
// steady state (same or smaller batches, same layer) allocates nothing.
// A Runner is not safe for concurrent use; give each goroutine its own (they
// may share the Net). Close stops its worker goroutines; a Runner that
// becomes unreachable is closed automatically.
type Runner struct {
	s *runState
}

// runState is the part of a Runner its worker goroutines see; it never
// points back at the Runner, so an unreachable Runner can be cleaned up.
type runState struct {
	net     *Net
	threads int
	tile    int
	workers []*worker
	start   []chan struct{} // one per worker goroutine (workers 1..threads-1)
	wg      sync.WaitGroup
	once    sync.Once

	// The current job, written before workers are started.
	canonPhase bool
	b          *Batch
	rows       int
	ntiles     int
	target     *netLayer
	recon      bool // ReconstructionAt: dst holds one value per stored pair
	dst        []float32
	dense      [][]float32 // per dense input: the batch's matrix (nil when unused)
	next       atomic.Int64

	// The canonical sparse rows: row r's pairs are at
	// canonIdx/canonVal[Indptr[r] : Indptr[r]+canonCnt[r]].
	canonIdx []int32
	canonVal []float32
	canonCnt []int32
}

// worker is one goroutine's scratch.
type worker struct {
	bufs    [][]float32 // per layer: tile×width
	keys    []uint64    // a row's pairs as sort keys (pairKey)
	tIndptr []int32
	tIdx    []int32
	tVal    []float32

	fault rowFault // the first (lowest-row) problem this worker found
}

// NewRunner returns a Runner that splits each batch into tiles of rows and
// computes them on up to threads goroutines (the caller's and threads-1
// workers); threads below 1 means 1. Results do not depend on threads or on
// the tile size: every output row is bit-identical to the same row computed
// alone.
func (n *Net) NewRunner(threads int) *Runner {
	threads = max(threads, 1)
	s := &runState{net: n, threads: threads, tile: DefaultTileRows, dense: make([][]float32, len(n.dense))}
	s.workers = make([]*worker, threads)
	for i := range s.workers {
		s.workers[i] = &worker{bufs: make([][]float32, len(n.layers))}
	}
	for i := 1; i < threads; i++ {
		ch := make(chan struct{}, 1)
		s.start = append(s.start, ch)
		go s.serve(i, ch)
	}
	r := &Runner{s: s}
	runtime.AddCleanup(r, func(s *runState) { s.stop() }, s)
	return r
}

// SetTileRows sets how many rows are computed together (below 1 means
// DefaultTileRows). It changes speed and memory, never results.
func (r *Runner) SetTileRows(rows int) {
	if rows < 1 {
		rows = DefaultTileRows
	}
	r.s.tile = rows
}

// Close stops the Runner's worker goroutines. The Runner must not be used
// afterwards. Close is idempotent.
func (r *Runner) Close() { r.s.stop() }

func (s *runState) stop() {
	s.once.Do(func() {
		for _, ch := range s.start {
			close(ch)
		}
	})
}

func (s *runState) serve(id int, ch chan struct{}) {
	for range ch {
		s.work(id)
		s.wg.Done()
	}
}

// Run computes layer for every row of b and writes the result, rows×width
// row-major (width = Net.Width(layer)), into dst, which is grown when it is
// too small; it returns dst resliced to that length. Only the layers that
// layer depends on are computed, and only the dense inputs they read must be
// in b.Dense (each a Rows()×Size matrix of finite values).
//
// The sparse input of each row is taken, in this order, through:
//
//  1. every index must lie in [0, Rows()) — Rows() includes the unknown
//     bucket, index VocabularySize, when the unknown rule is "bucket";
//  2. every value must be finite and ≥ 0;
//  3. pairs with equal indices are merged by the duplicates rule: "sum"
//     adds the values, "max" keeps the largest, "refuse" refuses the row;
//     pairs of the unknown bucket index are always summed, whatever the rule;
//  4. the transform maps each merged value v: identity v, log1p ln(1+v),
//     binary 1 if v > 0 else 0; a zero result contributes nothing.
//
// The merge and transform run in float64 over the row's pairs sorted by
// (index, value) and round once to float32; a result that is not finite in
// float32 refuses the row. So permuting a row's (index, value) pairs in
// lockstep gives bit-identical outputs, and a row's output is bit-identical
// whatever batch, position, tile size or thread count it is computed in.
// Empty rows are allowed: their sparse_dense output is act(bias).
//
// A refused row makes Run return an error of kind errkind.BadInput that
// wraps a *RowError for the lowest refused row; dst's contents are then
// unspecified. Run refuses malformed batches (Indptr not starting at 0, not
// non-decreasing, or not ending at len(Indices) = len(Values)) and missing or
// misshapen dense inputs the same way, without a RowError.
func (r *Runner) Run(b *Batch, layer string, dst []float32) ([]float32, error) {
	s := r.s
	li, ok := s.net.byName[layer]
	if !ok {
		return dst[:0], errkind.New(errkind.BadInput, "running model: no layer %q", layer)
	}
	t := s.net.layers[li]
	rows, err := s.setup(b, t)
	if err != nil {
		return dst[:0], err
	}
	dst = grow(dst, rows*t.width)
	if rows == 0 {
		return dst, nil
	}
	s.dst, s.recon = dst, false
	err = s.execute()
	s.release()
	return dst, err
}

// ReconstructionAt computes, for each stored pair (row r, index i) of b in
// CSR order — position p of b.Indices, duplicates and zero values included —
// the model's reconstruction (decoder output) layer at row r, column i, and
// writes it to dst[p]; dst is grown to len(b.Indices) and returned. The
// values equal, bit for bit, the full Run of the reconstruction layer at
// those positions, but when that layer is a tied_decoder only the needed
// columns are computed, so a reconstruction loss restricted to the nonzeros
// never pays for the vocabulary-wide output. Rows are checked and refused as
// in Run. It is an error (errkind.BadInput) if the model has no
// reconstruction layer.
func (r *Runner) ReconstructionAt(b *Batch, dst []float32) ([]float32, error) {
	s := r.s
	if s.net.recon == "" {
		return dst[:0], errkind.New(errkind.BadInput, "reconstructing: model has no reconstruction layer")
	}
	t := s.net.layers[s.net.byName[s.net.recon]]
	rows, err := s.setup(b, t)
	if err != nil {
		return dst[:0], err
	}
	dst = grow(dst, len(b.Indices))
	if rows == 0 {
		return dst, nil
	}
	s.dst, s.recon = dst, true
	err = s.execute()
	s.release()
	return dst, err
}

func grow(dst []float32, n int) []float32 {
	if cap(dst) < n {
		return make([]float32, n)
	}
	return dst[:n]
}

// setup checks the batch's structure and the dense inputs target needs,
// and prepares the job.
func (s *runState) setup(b *Batch, t *netLayer) (int, error) {
	rows := b.Rows()
	if rows == 0 {
		if len(b.Indices) != 0 || len(b.Values) != 0 {
			return 0, errkind.New(errkind.BadInput, "running model: batch has no rows but %d indices and %d values", len(b.Indices), len(b.Values))
		}
		return 0, nil
	}
	if b.Indptr[0] != 0 {
		return 0, errkind.New(errkind.BadInput, "running model: batch indptr starts at %d, want 0", b.Indptr[0])
	}
	for r := 0; r < rows; r++ {
		if b.Indptr[r+1] < b.Indptr[r] {
			return 0, errkind.New(errkind.BadInput, "running model: batch row %d: indptr decreases from %d to %d", r, b.Indptr[r], b.Indptr[r+1])
		}
	}
	nnz := int(b.Indptr[rows])
	if nnz != len(b.Indices) || nnz != len(b.Values) {
		return 0, errkind.New(errkind.BadInput, "running model: batch indptr ends at %d, but there are %d indices and %d values", nnz, len(b.Indices), len(b.Values))
	}
	for i := range s.dense {
		s.dense[i] = nil
	}
	for _, i := range t.denseUsed {
		d := s.net.dense[i]
		m, ok := b.Dense[d.Name]
		if !ok {
			return 0, errkind.New(errkind.BadInput, "running model: batch lacks dense input %q", d.Name)
		}
		if len(m) != rows*d.Size {
			return 0, errkind.New(errkind.BadInput, "running model: dense input %q has %d values, want %d rows × %d", d.Name, len(m), rows, d.Size)
		}
		s.dense[i] = m
	}
	if cap(s.canonIdx) < nnz {
		s.canonIdx = make([]int32, nnz)
		s.canonVal = make([]float32, nnz)
	}
	s.canonIdx, s.canonVal = s.canonIdx[:nnz], s.canonVal[:nnz]
	if cap(s.canonCnt) < rows {
		s.canonCnt = make([]int32, rows)
	}
	s.canonCnt = s.canonCnt[:rows]
	s.b, s.rows, s.target = b, rows, t
	s.ntiles = (rows + s.tile - 1) / s.tile
	return rows, nil
}

// release drops the job's references to caller memory.
func (s *runState) release() {
	s.b, s.dst, s.target = nil, nil, nil
	for i := range s.dense {
		s.dense[i] = nil
	}
}

// execute checks and canonicalises every row, then computes.
func (s *runState) execute() error {
	s.reserve()
	for _, w := range s.workers {
		w.fault = rowFault{}
	}
	s.canonPhase = true
	s.dispatch()
	var first *worker
	for _, w := range s.workers {
		if w.fault.problem != 0 && (first == nil || w.fault.row < first.fault.row) {
			first = w
		}
	}
	if first != nil {
		return errkind.Wrap(errkind.BadInput, fmt.Errorf("running model: %w", first.fault.err(s.net)))
	}
	s.canonPhase = false
	s.dispatch()
	return nil
}

// dispatch runs work on the caller and as many workers as there are tiles
// for, and waits for all.
func (s *runState) dispatch() {
	s.next.Store(0)
	n := min(s.threads, s.ntiles)
	s.wg.Add(n - 1)
	for i := 1; i < n; i++ {
		s.start[i-1] <- struct{}{}
	}
	s.work(0)
	s.wg.Wait()
}

func (s *runState) work(id int) {
	w := s.workers[id]
	for {
		t := int(s.next.Add(1)) - 1
		if t >= s.ntiles {
			return
		}
		r0 := t * s.tile
		r1 := min(r0+s.tile, s.rows)
		if s.canonPhase {
			if w.fault.problem != 0 {
				continue // a lower row of this worker's was refused already
			}
			s.canonTile(w, r0, r1)
		} else {
			s.computeTile(w, r0, r1)
		}
	}
}

// RowProblem says why the runtime refused a row.
type RowProblem uint8

// Row problems, in the order Run checks them within a row.
const (
	// IndexOutOfRange: a sparse index outside [0, Rows()).
	IndexOutOfRange RowProblem = iota + 1
	// InvalidValue: a sparse value that is NaN, infinite or negative.
	InvalidValue
	// DuplicateIndex: an index repeated under the duplicates rule "refuse".
	DuplicateIndex
	// ValueOverflow: a merged, transformed value too large for float32.
	ValueOverflow
	// InvalidDenseValue: a dense input value that is NaN or infinite.
	InvalidDenseValue
)

func (p RowProblem) String() string {
	switch p {
	case IndexOutOfRange:
		return "index out of range"
	case InvalidValue:
		return "invalid value"
	case DuplicateIndex:
		return "duplicate index"
	case ValueOverflow:
		return "value overflow"
	case InvalidDenseValue:
		return "invalid dense value"
	}
	return "unknown problem"
}

// RowError describes a row the runtime refused.
type RowError struct {
	Row     int        // the row, from 0 in the batch
	Problem RowProblem // what is wrong
	// Index is the sparse index concerned (all problems but InvalidDenseValue).
	Index int32
	// Value is the offending value (InvalidValue, InvalidDenseValue).
	Value float32
	// Input and Column locate an InvalidDenseValue.
	Input  string
	Column int
	// Limit is Rows() for IndexOutOfRange.
	Limit int
}

func (e *RowError) Error() string {
	switch e.Problem {
	case IndexOutOfRange:
		return fmt.Sprintf("row %d: sparse index %d is outside [0, %d)", e.Row, e.Index, e.Limit)
	case InvalidValue:
		return fmt.Sprintf("row %d: sparse index %d has value %v, want a finite value ≥ 0", e.Row, e.Index, e.Value)
	case DuplicateIndex:
		return fmt.Sprintf("row %d: sparse index %d appears more than once and the duplicates rule is %q", e.Row, e.Index, DuplicatesRefuse)
	case ValueOverflow:
		return fmt.Sprintf("row %d: sparse index %d: the merged, transformed value overflows float32", e.Row, e.Index)
	case InvalidDenseValue:
		return fmt.Sprintf("row %d: dense input %q column %d has value %v, want a finite value", e.Row, e.Input, e.Column, e.Value)
	}
	return fmt.Sprintf("row %d: refused", e.Row)
}

// rowFault is a RowError before it is built (building one allocates).
type rowFault struct {
	problem RowProblem
	row     int
	index   int32
	value   float32
	input   int
	column  int
}

func (f rowFault) err(n *Net) *RowError {
	e := &RowError{Row: f.row, Problem: f.problem, Index: f.index, Value: f.value, Column: f.column}
	switch f.problem {
	case IndexOutOfRange:
		e.Limit = n.rows
	case InvalidDenseValue:
		e.Input = n.dense[f.input].Name
	}
	return e
}

// canonTile checks rows [r0, r1) and writes their canonical sparse pairs.
// It stops at the first refused row.
func (s *runState) canonTile(w *worker, r0, r1 int) {
	for r := r0; r < r1; r++ {
		if f := s.canonRow(w, r); f.problem != 0 {
			f.row = r
			w.fault = f
			return
		}
		for _, i := range s.target.denseUsed {
			size := s.net.dense[i].Size
			for c, v := range s.dense[i][r*size : (r+1)*size] {
				if v-v != 0 { // NaN or ±Inf
					w.fault = rowFault{problem: InvalidDenseValue, row: r, input: i, column: c, value: v}
					return
				}
			}
		}
	}
}

// pairKey packs a checked pair (0 <= idx, 0 <= val <= MaxFloat32) into a
// key whose order is the pairs' order by (index, value): a non-negative
// float's bits order as its value does. val+0 turns -0 into +0, which
// changes no result: zeros add nothing, and a zero result is dropped.
func pairKey(idx int32, val float32) uint64 {
	return uint64(uint32(idx))<<32 | uint64(math.Float32bits(val+0))
}

// canonRow applies the sparse input rules (see Run) to row r.
func (s *runState) canonRow(w *worker, r int) rowFault {
	b := s.b
	start, end := b.Indptr[r], b.Indptr[r+1]
	idx, val := b.Indices[start:end], b.Values[start:end]
	limit := int32(s.net.rows)
	for _, i := range idx {
		if i < 0 || i >= limit {
			return rowFault{problem: IndexOutOfRange, index: i}
		}
	}
	for p, v := range val {
		if !(v >= 0) || v > math.MaxFloat32 {
			return rowFault{problem: InvalidValue, index: idx[p], value: v}
		}
	}
	ks := w.keys[:0]
	for p, i := range idx {
		ks = append(ks, pairKey(i, val[p]))
	}
	w.keys = ks
	if len(ks) <= 24 {
		// Insertion sort, shifting the larger keys up (about half the
		// time of swapping pair by pair on rows of a few pairs).
		for i := 1; i < len(ks); i++ {
			x, j := ks[i], i
			for ; j > 0 && ks[j-1] > x; j-- {
				ks[j] = ks[j-1]
			}
			ks[j] = x
		}
	} else {
		slices.Sort(ks)
	}
	sp := &s.net.sparse
	out := start
	for i := 0; i < len(ks); {
		ix := int32(ks[i] >> 32)
		j := i + 1
		for j < len(ks) && int32(ks[j]>>32) == ix {
			j++
		}
		v := float64(math.Float32frombits(uint32(ks[i])))
		if j-i > 1 {
			switch {
			case ix == s.net.unknownIdx || sp.Duplicates == DuplicatesSum:
				for _, q := range ks[i+1 : j] {
					v += float64(math.Float32frombits(uint32(q)))
				}
			case sp.Duplicates == DuplicatesMax:
				v = float64(math.Float32frombits(uint32(ks[j-1])))
			default:
				return rowFault{problem: DuplicateIndex, index: ix}
			}
		}
		var f float32
		switch sp.Transform {
		case TransformLog1p:
			f = log1p32(v)
		case TransformBinary:
			if v > 0 {
				f = 1
			}
		default:
			f = float32(v)
		}
		if f > math.MaxFloat32 { // v >= 0, so f is never below -MaxFloat32
			return rowFault{problem: ValueOverflow, index: ix}
		}
		if f != 0 {
			s.canonIdx[out] = ix
			s.canonVal[out] = f
			out++
		}
		i = j
	}
	s.canonCnt[r] = out - start
	return rowFault{}
}

// log1pSmall holds float32(math.Log1p(k)) for the integers k below its
// length: counts (episodes played) are the usual sparse values, and a
// table entry is the very number the call gives.
var log1pSmall = func() (t [1024]float32) {
	for k := range t {
		t[k] = float32(math.Log1p(float64(k)))
	}
	return t
}()

// log1p32 is float32(math.Log1p(v)) for v >= 0, from log1pSmall when v
// is a small integer (-0 then gives +0; canonRow drops zeros either way).
func log1p32(v float64) float32 {
	if k := int(v); float64(k) == v && uint(k) < uint(len(log1pSmall)) {
		return log1pSmall[k]
	}
	return float32(math.Log1p(v))
}

// plan lists the layers the job computes: the target's plan, except that
// ReconstructionAt of a tied_decoder computes only its input's.
func (s *runState) plan() []int {
	t := s.target
	if s.recon && t.op == OpTiedDecoder {
		return t.plan[:len(t.plan)-1]
	}
	return t.plan
}

// reserve grows every worker's scratch to what the job can need, so that
// the workers themselves never allocate.
func (s *runState) reserve() {
	b := s.b
	longest, tileNNZ := 0, 0
	for t := 0; t < s.ntiles; t++ {
		r0, r1 := t*s.tile, min((t+1)*s.tile, s.rows)
		for r := r0; r < r1; r++ {
			longest = max(longest, int(b.Indptr[r+1]-b.Indptr[r]))
		}
		tileNNZ = max(tileNNZ, int(b.Indptr[r1]-b.Indptr[r0]))
	}
	m := min(s.tile, s.rows)
	for _, w := range s.workers[:min(s.threads, s.ntiles)] {
		if cap(w.keys) < longest {
			w.keys = make([]uint64, 0, longest)
		}
		if cap(w.tIdx) < tileNNZ {
			w.tIdx = make([]int32, 0, tileNNZ)
			w.tVal = make([]float32, 0, tileNNZ)
		}
		if cap(w.tIndptr) < m+1 {
			w.tIndptr = make([]int32, 0, m+1)
		}
		for _, j := range s.plan() {
			l := s.net.layers[j]
			if l == s.target && !s.recon {
				continue // written straight into dst
			}
			if cap(w.bufs[j]) < m*l.width {
				w.bufs[j] = make([]float32, m*l.width)
			}
		}
	}
}

// computeTile evaluates the job's layers for rows [r0, r1).
func (s *runState) computeTile(w *worker, r0, r1 int) {
	m := r1 - r0
	t := s.target
	plan := s.plan()
	// The tile's canonical rows as CSR.
	needSparse := false
	for _, j := range plan {
		if s.net.layers[j].op == OpSparseDense {
			needSparse = true
			break
		}
	}
	if needSparse {
		w.tIndptr = append(w.tIndptr[:0], 0)
		w.tIdx, w.tVal = w.tIdx[:0], w.tVal[:0]
		for r := r0; r < r1; r++ {
			st := s.b.Indptr[r]
			en := st + s.canonCnt[r]
			w.tIdx = append(w.tIdx, s.canonIdx[st:en]...)
			w.tVal = append(w.tVal, s.canonVal[st:en]...)
			w.tIndptr = append(w.tIndptr, int32(len(w.tIdx)))
		}
	}
	for _, j := range plan {
		l := s.net.layers[j]
		var out []float32
		ldc := l.width
		if l == t && !s.recon {
			out = s.dst[r0*ldc : r1*ldc]
		} else {
			out = w.bufs[j][:m*ldc]
		}
		switch l.op {
		case OpSparseDense:
			kernel.SparseDense(w.tIndptr, w.tIdx, w.tVal, l.w, l.width, l.bias, out, ldc, l.act)
		case OpDense, OpTiedDecoder:
			a, lda := s.input(w, l.srcs[0], r0)
			kernel.DensePacked(m, a, lda, l.packed, l.bias, out, ldc, l.act)
		case OpConcat:
			off := 0
			for _, src := range l.srcs {
				a, lda := s.input(w, src, r0)
				for i := 0; i < m; i++ {
					copy(out[i*ldc+off:i*ldc+off+src.width], a[i*lda:i*lda+src.width])
				}
				off += src.width
			}
		}
	}
	if s.recon {
		s.gatherRecon(w, t, r0, r1)
	}
}

// input returns the rows of src from row r0 of the tile on, and their stride.
func (s *runState) input(w *worker, src source, r0 int) ([]float32, int) {
	if src.kind == srcDense {
		return s.dense[src.i][r0*src.width:], src.width
	}
	return w.bufs[src.i], src.width
}

// gatherRecon writes the reconstruction at each stored pair of rows [r0, r1).
func (s *runState) gatherRecon(w *worker, t *netLayer, r0, r1 int) {
	b := s.b
	if t.op != OpTiedDecoder {
		full := w.bufs[s.net.byName[t.name]]
		for r := r0; r < r1; r++ {
			row := full[(r-r0)*t.width:]
			for p := b.Indptr[r]; p < b.Indptr[r+1]; p++ {
				s.dst[p] = row[b.Indices[p]]
			}
		}
		return
	}
	h := t.inW
	a, lda := s.input(w, t.srcs[0], r0)
	for r := r0; r < r1; r++ {
		hr := a[(r-r0)*lda : (r-r0)*lda+h]
		for p := b.Indptr[r]; p < b.Indptr[r+1]; p++ {
			i := int(b.Indices[p])
			var bias []float32
			if t.bias != nil {
				bias = t.bias[i : i+1]
			}
			// Column i of Wᵀ is row i of W: a k×1 matrix. The kernels give
			// every element the same value however the columns are grouped
			// or packed, so this equals the full decoder's element.
			kernel.Dense(1, 1, h, hr, lda, t.w[i*h:(i+1)*h], bias, s.dst[p:p+1], 1, t.act)
		}
	}
}
