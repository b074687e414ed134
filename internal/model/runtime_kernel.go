package model

// TEMPORARY scalar stand-ins for package kernel, replaced by it once it lands.

import (
	"fmt"
	"math"
)

type activation uint8

const (
	actIdentity activation = iota
	actReLU
	actSigmoid
	actTanh
)

func parseActivation(s string) (activation, error) {
	switch s {
	case "", ActIdentity:
		return actIdentity, nil
	case ActReLU:
		return actReLU, nil
	case ActSigmoid:
		return actSigmoid, nil
	case ActTanh:
		return actTanh, nil
	}
	return 0, fmt.Errorf("activation %q is not one of identity, relu, sigmoid, tanh", s)
}

func applyAct(v float32, act activation) float32 {
	switch act {
	case actReLU:
		return max(v, 0)
	case actSigmoid:
		return float32(1 / (1 + math.Exp(-float64(v))))
	case actTanh:
		return float32(math.Tanh(float64(v)))
	}
	return v
}

func kDense(m, n, k int, a []float32, lda int, b []float32, bias []float32, c []float32, ldc int, act activation) {
	for i := 0; i < m; i++ {
		for j := 0; j < n; j++ {
			var s float32
			if bias != nil {
				s = bias[j]
			}
			for p := 0; p < k; p++ {
				s += a[i*lda+p] * b[p*n+j]
			}
			c[i*ldc+j] = applyAct(s, act)
		}
	}
}

func kSparseDense(indptr []int32, idx []int32, vals []float32, w []float32, n int, bias []float32, c []float32, ldc int, act activation) {
	for r := 0; r+1 < len(indptr); r++ {
		row := c[r*ldc : r*ldc+n]
		for j := range row {
			if bias != nil {
				row[j] = bias[j]
			} else {
				row[j] = 0
			}
		}
		for p := indptr[r]; p < indptr[r+1]; p++ {
			v := vals[p]
			wr := w[int(idx[p])*n : int(idx[p])*n+n]
			for j := range row {
				row[j] += v * wr[j]
			}
		}
		for j := range row {
			row[j] = applyAct(row[j], act)
		}
	}
}

func kDenseT(m, n, k int, a []float32, lda int, w []float32, bias []float32, c []float32, ldc int, act activation) {
	for i := 0; i < m; i++ {
		for j := 0; j < n; j++ {
			var s float32
			if bias != nil {
				s = bias[j]
			}
			for p := 0; p < k; p++ {
				s += a[i*lda+p] * w[j*k+p]
			}
			c[i*ldc+j] = applyAct(s, act)
		}
	}
}
