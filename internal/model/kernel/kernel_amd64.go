//go:build amd64 && !purego

package kernel

import (
	"unsafe"

	"golang.org/x/sys/cpu"
)

//go:generate go run asmgen.go

// tileFunc is the signature of a generated tile kernel: rows × vectors of
// outputs over the full reduction k (see asmgen.go).
type tileFunc func(k int, a *float32, lda int, b *float32, ldb int, bias *float32, c *float32, ldc int, mask int, flags int)

// sparseFunc is the signature of a generated sparse row kernel.
type sparseFunc func(idx *int32, vals *float32, nnz int, w *float32, n int, bias *float32, c *float32, mask int, flags int)

// asmSet describes one instruction set's generated kernels.
type asmSet struct {
	tiles   [][][2]tileFunc // [rows-1][vectors-1][masked]
	sparse  sparseFunc
	lanes   int
	maxRows int
	maxVecs int
	// mask turns the number of live lanes of the last vector into the kernel's
	// mask argument.
	mask func(live int) int
}

// avx2Masks[n] enables the first n of eight lanes (VMASKMOVPS reads the sign bit).
var avx2Masks = func() (m [9][8]int32) {
	for n := range m {
		for i := 0; i < n; i++ {
			m[n][i] = -1
		}
	}
	return m
}()

var (
	avx512Set = &asmSet{
		tiles: func() [][][2]tileFunc {
			var t [][][2]tileFunc
			for i := range denseAVX512Tiles {
				t = append(t, denseAVX512Tiles[i][:])
			}
			return t
		}(),
		sparse: sparseRowAVX512, lanes: lanesAVX512, maxRows: maxRowsAVX512, maxVecs: maxVecsAVX512,
		mask: func(live int) int { return 1<<live - 1 },
	}
	avx2Set = &asmSet{
		tiles: func() [][][2]tileFunc {
			var t [][][2]tileFunc
			for i := range denseAVX2Tiles {
				t = append(t, denseAVX2Tiles[i][:])
			}
			return t
		}(),
		sparse: sparseRowAVX2, lanes: lanesAVX2, maxRows: maxRowsAVX2, maxVecs: maxVecsAVX2,
		mask: func(live int) int { return int(uintptr(unsafe.Pointer(&avx2Masks[live]))) },
	}
)

var (
	avx512 = &backend{name: "avx512", dense: avx512Set.dense, sparse: avx512Set.sparseDense,
		logBlocks: logAVX512, lossBlocks: lossAVX512}
	avx2 = &backend{name: "avx2+fma", dense: avx2Set.dense, sparse: avx2Set.sparseDense,
		logBlocks: logAVX2, lossBlocks: lossAVX2}
)

// backends lists the implementations this CPU can run, fastest first.
func backends() []*backend {
	var out []*backend
	if cpu.X86.HasAVX512F {
		out = append(out, avx512)
	}
	if cpu.X86.HasAVX2 && cpu.X86.HasFMA {
		out = append(out, avx2)
	}
	return append(out, generic)
}

var active = backends()[0]

// flagsFor encodes bias and relu for the kernels; sigmoid and tanh are applied
// afterwards in Go.
func flagsFor(bias []float32, act Activation) int {
	f := 0
	if bias != nil {
		f |= 1
	}
	if act == ReLU {
		f |= 2
	}
	return f
}

func (s *asmSet) dense(m, n, k int, a []float32, lda int, b matrix, bias []float32, c []float32, ldc int, act Activation) {
	if !checkDense(m, n, k, a, lda, bias, c, ldc) {
		return
	}
	if k == 0 {
		fillBias(m, n, bias, c, ldc, act)
		return
	}
	flags := flagsFor(bias, act)
	width := s.maxVecs * s.lanes
	mc, nc := blocking(k, s.maxRows, width)
	// Rows in chunks of mc (their part of a stays in L2), columns in blocks of nc
	// (their part of b stays in L2 while the chunk's rows pass over it), then
	// register tiles of maxRows × width. The blocking only orders the tiles: each
	// tile still runs the whole reduction, so no element depends on it.
	for ic := 0; ic < m; ic += mc {
		iend := min(m, ic+mc)
		for jc := 0; jc < n; jc += nc {
			jend := min(n, jc+nc)
			for i0 := ic; i0 < iend; i0 += s.maxRows {
				rows := min(s.maxRows, iend-i0)
				tiles := s.tiles[rows-1]
				for j0 := jc; j0 < jend; j0 += width {
					w := min(width, jend-j0)
					nv := (w + s.lanes - 1) / s.lanes
					live := w - (nv-1)*s.lanes
					masked, mask := 0, 0
					if live != s.lanes {
						masked, mask = 1, s.mask(live)
					}
					off, ldb := b.tile(j0)
					var bp *float32
					if bias != nil {
						bp = &bias[j0]
					}
					tiles[nv-1][masked](k, &a[i0*lda], lda, &b.data[off], ldb, bp, &c[i0*ldc+j0], ldc, mask, flags)
				}
			}
		}
		if act == Sigmoid || act == Tanh {
			for i := ic; i < iend; i++ {
				activate(c[i*ldc:i*ldc+n], act)
			}
		}
	}
}

// Cache budgets for blocking, in bytes: the part of a that a row chunk reads,
// and the part of b that a column block reads. Both share the L2 (2 MiB per
// core on the Xeons these were first tuned on, where blocking made no
// difference to a narrow code layer and nearly tripled the rate of a wide
// tied decoder).
const (
	chunkBytesA = 1 << 20
	blockBytesB = 256 << 10
)

// blocking returns the row chunk (a multiple of rows) and the column block (a
// multiple of width, which divides packWidth, so that no tile crosses a panel)
// for a reduction of length k.
func blocking(k, rows, width int) (mc, nc int) {
	mc = max(1, chunkBytesA/(4*k*rows)) * rows
	nc = max(1, blockBytesB/(4*k*width)) * width
	return mc, nc
}

func (s *asmSet) sparseDense(indptr, idx []int32, vals, w []float32, n int, bias, c []float32, ldc int, act Activation) {
	flags := flagsFor(bias, act)
	mask := s.mask(n % s.lanes)
	var bp *float32
	if bias != nil {
		bp = &bias[0]
	}
	for r := 0; r+1 < len(indptr); r++ {
		lo, hi := int(indptr[r]), int(indptr[r+1])
		var ip *int32
		var vp *float32
		if hi > lo {
			ip, vp = &idx[lo], &vals[lo]
		}
		row := c[r*ldc : r*ldc+n]
		s.sparse(ip, vp, hi-lo, unsafe.SliceData(w), n, bp, &row[0], mask, flags)
		if act == Sigmoid || act == Tanh {
			activate(row, act)
		}
	}
}
