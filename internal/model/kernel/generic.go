package kernel

// generic is the portable implementation. Every product is rounded before it
// is added (the explicit float32 conversion forbids the compiler to fuse the
// multiply-add), so its results are the same on every architecture.
var generic = &backend{name: "generic", dense: denseGeneric, sparse: sparseGeneric}

// denseGeneric accumulates each output row in place: c_i = 0, then
// c_i += a[i,p]·b[p,:] for p = 0..k-1, then bias and activation.
func denseGeneric(m, n, k int, a []float32, lda int, b matrix, bias []float32, c []float32, ldc int, act Activation) {
	if !checkDense(m, n, k, a, lda, bias, c, ldc) {
		return
	}
	for i := 0; i < m; i++ {
		row := c[i*ldc : i*ldc+n]
		clear(row)
		ai := a[i*lda:]
		for j0 := 0; j0 < n; j0 += packWidth {
			out := row[j0:min(j0+packWidth, n)]
			off, ld := b.tile(j0)
			for p := 0; p < k; p++ {
				axpy(ai[p], b.data[off+p*ld:off+p*ld+len(out)], out)
			}
		}
		finish(row, bias, act)
	}
}

func sparseGeneric(indptr, idx []int32, vals, w []float32, n int, bias, c []float32, ldc int, act Activation) {
	for r := 0; r+1 < len(indptr); r++ {
		row := c[r*ldc : r*ldc+n]
		clear(row)
		for e := indptr[r]; e < indptr[r+1]; e++ {
			off := int(idx[e]) * n
			axpy(vals[e], w[off:off+n], row)
		}
		finish(row, bias, act)
	}
}

// axpy computes y += float32(alpha·x) element by element.
func axpy(alpha float32, x, y []float32) {
	x = x[:len(y)]
	for j, v := range x {
		y[j] += float32(alpha * v)
	}
}

// finish adds the bias and applies the activation to one output row.
func finish(row, bias []float32, act Activation) {
	if bias != nil {
		bias = bias[:len(row)]
		for j := range row {
			row[j] += bias[j]
		}
	}
	activate(row, act)
}
