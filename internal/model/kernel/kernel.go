// Package kernel holds the float32 compute kernels of the reference runtime:
// dense and sparse-by-dense matrix products fused with bias and activation,
// and a vectorised natural logarithm with a batch log loss built on it
// (Log32, LogLoss32; see log.go).
//
// On amd64 the kernels run hand-written AVX-512 or AVX2+FMA assembly, chosen at
// run time from the CPU's features; elsewhere, or on CPUs without them, a
// portable Go path computes the same products.
//
// Determinism: every output element is one accumulator that starts at zero and
// takes the products of its reduction in index order (p = 0..k-1 for Dense,
// e = indptr[r]..indptr[r+1]-1 for SparseDense), then adds the bias, then applies
// the activation. Which rows share a call, where a row sits in the batch, how the
// caller splits rows across goroutines and whether the weight was packed never
// change an element's value. The assembly paths fuse each multiply-add (one
// rounding); the portable path rounds the product and the sum separately, so the
// two paths agree to rounding error, not bit for bit.
//
// The kernels trust their callers: shapes that do not fit the slices panic.
package kernel

import (
	"fmt"
	"math"
)

// Activation is the function applied to each output element after the bias.
type Activation uint8

// Activations.
const (
	Identity Activation = iota // x
	ReLU                       // max(x, 0)
	Sigmoid                    // 1 / (1 + e^-x)
	Tanh                       // tanh(x)
)

// String names the activation as the model spec does.
func (a Activation) String() string {
	switch a {
	case Identity:
		return "identity"
	case ReLU:
		return "relu"
	case Sigmoid:
		return "sigmoid"
	case Tanh:
		return "tanh"
	}
	return fmt.Sprintf("Activation(%d)", uint8(a))
}

// Features reports which code path the kernels use on this CPU: "avx512",
// "avx2+fma" or "generic".
func Features() string { return active.name }

// Dense computes, for each row i < m and column j < n,
//
//	c[i*ldc+j] = act(bias[j] + sum_{p<k} a[i*lda+p] * b[p*n+j])
//
// where b is k×n row-major and bias may be nil (no bias). The value of each
// output row depends only on that row of a, on b and on bias (see the package
// comment). For repeated products with the same b, PackB and DensePacked avoid
// re-reading b in its row-major layout.
func Dense(m, n, k int, a []float32, lda int, b []float32, bias []float32, c []float32, ldc int, act Activation) {
	if len(b) < k*n {
		panic(fmt.Sprintf("kernel: b has %d elements, want %d×%d", len(b), k, n))
	}
	active.dense(m, n, k, a, lda, matrix{data: b, k: k, n: n}, bias, c, ldc, act)
}

// DenseT computes c[i*ldc+j] = act(bias[j] + sum_{p<k} a[i*lda+p] * w[j*k+p]):
// the product with the transpose of w, an n×k row-major matrix (a decoder tied
// to an encoder weight). It packs the transpose on every call; callers that
// reuse w should pack it once with PackBT and call DensePacked, which gives
// bit-identical results. Same determinism contract as Dense.
func DenseT(m, n, k int, a []float32, lda int, w []float32, bias []float32, c []float32, ldc int, act Activation) {
	if m <= 0 || n <= 0 {
		return
	}
	DensePacked(m, a, lda, PackBT(k, n, w), bias, c, ldc, act)
}

// SparseDense computes one CSR row block: for each row r < len(indptr)-1 and
// column j < n,
//
//	c[r*ldc+j] = act(bias[j] + sum_{e = indptr[r]}^{indptr[r+1]-1} vals[e] * w[idx[e]*n+j])
//
// taking the terms in the order of e. w is a row-major matrix with n columns;
// bias may be nil. The caller is expected to have checked that every idx[e]
// names a row of w; SparseDense checks it again (a cheap pass over the indices)
// and panics if one does not, so that a bad index can never read outside w.
func SparseDense(indptr []int32, idx []int32, vals []float32, w []float32, n int, bias []float32, c []float32, ldc int, act Activation) {
	rows := len(indptr) - 1
	if rows <= 0 || n <= 0 {
		return
	}
	checkBias(bias, n)
	checkOut("c", c, rows, n, ldc)
	if start, end := int(indptr[0]), int(indptr[rows]); start < 0 || start > end || end > len(idx) || end > len(vals) {
		panic(fmt.Sprintf("kernel: indptr spans %d..%d, outside %d indices and %d values", start, end, len(idx), len(vals)))
	}
	for r := 0; r < rows; r++ {
		if indptr[r] > indptr[r+1] {
			panic(fmt.Sprintf("kernel: indptr decreases at row %d", r))
		}
	}
	rowsW := len(w) / n
	for _, i := range idx[indptr[0]:indptr[rows]] {
		if i < 0 || int(i) >= rowsW {
			panic(fmt.Sprintf("kernel: index %d outside the %d rows of w", i, rowsW))
		}
	}
	active.sparse(indptr, idx, vals, w, n, bias, c, ldc, act)
}

// Packed is a k×n weight matrix laid out for DensePacked: column panels of
// packWidth columns, each stored k×packWidth row-major, the last one padded with
// zeros. A Packed value is read-only and safe for concurrent use.
type Packed struct {
	k, n int
	data []float32
}

// packWidth is the column width of a panel of a Packed matrix.
const packWidth = 64

// K is the reduction length (rows of the matrix).
func (p *Packed) K() int { return p.k }

// N is the number of output columns.
func (p *Packed) N() int { return p.n }

// PackB packs the k×n row-major matrix b for DensePacked.
func PackB(k, n int, b []float32) *Packed {
	if len(b) < k*n {
		panic(fmt.Sprintf("kernel: b has %d elements, want %d×%d", len(b), k, n))
	}
	p := newPacked(k, n)
	for q := 0; q*packWidth < n; q++ {
		panel := p.data[q*k*packWidth:]
		j0 := q * packWidth
		w := min(packWidth, n-j0)
		for i := 0; i < k; i++ {
			copy(panel[i*packWidth:i*packWidth+w], b[i*n+j0:i*n+j0+w])
		}
	}
	return p
}

// PackBT packs the transpose of w, an n×k row-major matrix, so that
// DensePacked computes the product with wᵀ (as DenseT does).
func PackBT(k, n int, w []float32) *Packed {
	if len(w) < k*n {
		panic(fmt.Sprintf("kernel: w has %d elements, want %d×%d", len(w), n, k))
	}
	p := newPacked(k, n)
	for j := 0; j < n; j++ {
		panel := p.data[(j/packWidth)*k*packWidth+j%packWidth:]
		row := w[j*k : j*k+k]
		for i, v := range row {
			panel[i*packWidth] = v
		}
	}
	return p
}

func newPacked(k, n int) *Packed {
	panels := (n + packWidth - 1) / packWidth
	return &Packed{k: k, n: n, data: make([]float32, panels*k*packWidth)}
}

// DensePacked is Dense with a packed b (see PackB and PackBT): b.K() is the
// reduction length and b.N() the number of output columns. Its results are
// bit-identical to Dense on the same unpacked matrix.
func DensePacked(m int, a []float32, lda int, b *Packed, bias []float32, c []float32, ldc int, act Activation) {
	active.dense(m, b.n, b.k, a, lda, matrix{data: b.data, k: b.k, n: b.n, packed: true}, bias, c, ldc, act)
}

// matrix is a k×n right-hand operand, row-major or packed in panels.
type matrix struct {
	data   []float32
	k, n   int
	packed bool
}

// tile returns the offset of element (0, j0) and the row stride of the columns
// j0..j0+w-1, which must not cross a panel boundary when packed.
func (b matrix) tile(j0 int) (off, ld int) {
	if !b.packed {
		return j0, b.n
	}
	return (j0/packWidth)*b.k*packWidth + j0%packWidth, packWidth
}

// backend is one implementation of the kernels.
type backend struct {
	name   string
	dense  func(m, n, k int, a []float32, lda int, b matrix, bias []float32, c []float32, ldc int, act Activation)
	sparse func(indptr, idx []int32, vals, w []float32, n int, bias, c []float32, ldc int, act Activation)
	// logBlocks and lossBlocks are the vector paths of Log32 and LogLoss32
	// (see log.go) over n elements, n a multiple of 16; nil on the portable
	// path, which computes element by element.
	logBlocks  func(dst, x *float32, n int)
	lossBlocks func(p, y *float32, n int, acc *[16]float64)
}

// checkDense validates the shapes of a dense product and reports whether there
// is anything to compute.
func checkDense(m, n, k int, a []float32, lda int, bias, c []float32, ldc int) bool {
	if m <= 0 || n <= 0 {
		return false
	}
	if k < 0 {
		panic(fmt.Sprintf("kernel: negative k %d", k))
	}
	if k > 0 {
		checkOut("a", a, m, k, lda)
	}
	checkBias(bias, n)
	checkOut("c", c, m, n, ldc)
	return true
}

func checkOut(name string, x []float32, rows, cols, ld int) {
	if ld < cols || len(x) < (rows-1)*ld+cols {
		panic(fmt.Sprintf("kernel: %s has %d elements and stride %d, too few for %d×%d", name, len(x), ld, rows, cols))
	}
}

func checkBias(bias []float32, n int) {
	if bias != nil && len(bias) < n {
		panic(fmt.Sprintf("kernel: bias has %d elements, want %d", len(bias), n))
	}
}

// fillBias writes act(bias) (or act(0)) into the m×n block of c: the result of
// a product with an empty reduction.
func fillBias(m, n int, bias, c []float32, ldc int, act Activation) {
	for i := 0; i < m; i++ {
		row := c[i*ldc : i*ldc+n]
		for j := range row {
			var v float32
			if bias != nil {
				v += bias[j]
			}
			row[j] = v
		}
		activate(row, act)
	}
}

// activate applies act in place. ReLU here is the same max(x, 0) the assembly
// computes; sigmoid and tanh are computed in float64 and rounded once.
func activate(x []float32, act Activation) {
	switch act {
	case ReLU:
		for i, v := range x {
			x[i] = relu(v)
		}
	case Sigmoid:
		for i, v := range x {
			x[i] = float32(1 / (1 + math.Exp(-float64(v))))
		}
	case Tanh:
		for i, v := range x {
			x[i] = float32(math.Tanh(float64(v)))
		}
	}
}

// relu returns v if v > 0 and +0 otherwise (NaN becomes 0), matching VMAXPS(v, 0)
// with zero as the second source.
func relu(v float32) float32 {
	if v > 0 {
		return v
	}
	return 0
}
