package fit

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"

	"github.com/modelgate/modelgate/internal/errkind"
)

// PCA is a truncated principal component analysis of a matrix whose rows
// are observations (listeners) and whose columns are variables (shows).
//
// As a linear autoencoder at its optimum, the code of a row x is
// (x − Mean)·Cᵀ, where C is the K×Cols matrix whose rows are Components,
// and the reconstruction is code·C + Mean.
type PCA struct {
	// Rows is the number of observations fitted.
	Rows int
	// Mean holds the column means (len Cols).
	Mean []float64
	// Components are the top K unit-norm eigenvectors of the sample
	// covariance, in order of decreasing eigenvalue. Sign convention: the
	// entry of largest absolute value of each component is positive (the
	// first such entry if several tie).
	Components [][]float64
	// ExplainedVariance holds the eigenvalues matching Components: the
	// sample variance (divisor Rows−1) of the data along each component.
	ExplainedVariance []float64
	// TotalVariance is the trace of the sample covariance: the sum of the
	// column variances, so ExplainedVariance[i]/TotalVariance is the
	// fraction of variance component i explains.
	TotalVariance float64
}

// K is the number of components kept.
func (p *PCA) K() int { return len(p.Components) }

// Truncate returns a PCA that keeps only the first k components. The
// result shares memory with p. Truncating is exact: the first k components
// of a K-component fit are the k-component fit.
func (p *PCA) Truncate(k int) (*PCA, error) {
	if k < 1 || k > p.K() {
		return nil, errkind.New(errkind.BadInput, "pca: cannot truncate %d components to %d", p.K(), k)
	}
	q := *p
	q.Components = p.Components[:k]
	q.ExplainedVariance = p.ExplainedVariance[:k]
	return &q, nil
}

// FitPCA fits a k-component PCA of x, centring each column by its mean.
//
// Method: the exact eigendecomposition (gonum's EigenSym, LAPACK dsyev) of
// the Cols×Cols sample covariance, accumulated from the sparse rows as
// (XᵀX − n·μμᵀ)/(n−1). Activity matrices have many more rows than columns
// and only a few nonzeros per row, so the covariance costs O(Σ nnz²) to
// build and Cols² memory, whereas an SVD of the centred matrix would need
// it dense (Rows×Cols). The eigendecomposition costs O(Cols³) in pure Go:
// a few seconds for 1,000 columns and minutes for 3,000 on a small shared
// machine (measured: 2.6 s and 5 min); keep vocabularies to what the caller
// can afford.
//
// It needs at least two rows and 1 ≤ k ≤ Cols.
func FitPCA(x *Sparse, k int) (*PCA, error) {
	if err := x.Validate(); err != nil {
		return nil, fmt.Errorf("pca: %w", err)
	}
	n, v := x.Rows, x.Cols
	if n < 2 {
		return nil, errkind.New(errkind.BadInput, "pca: need at least 2 rows, have %d", n)
	}
	if k < 1 || k > v {
		return nil, errkind.New(errkind.BadInput, "pca: k=%d outside [1,%d]", k, v)
	}

	mean := make([]float64, v)
	for i, c := range x.Indices {
		mean[c] += x.Values[i]
	}
	for c := range mean {
		mean[c] /= float64(n)
	}

	// Upper triangle of XᵀX, row-major v×v.
	s := make([]float64, v*v)
	for r := 0; r < n; r++ {
		lo, hi := x.Indptr[r], x.Indptr[r+1]
		for i := lo; i < hi; i++ {
			ci, vi := x.Indices[i], x.Values[i]
			for j := lo; j < hi; j++ {
				if cj := x.Indices[j]; ci <= cj {
					s[ci*v+cj] += vi * x.Values[j]
				}
			}
		}
	}
	nf := float64(n)
	total := 0.0
	for i := 0; i < v; i++ {
		row := s[i*v:]
		for j := i; j < v; j++ {
			row[j] = (row[j] - nf*mean[i]*mean[j]) / (nf - 1)
		}
		total += row[i]
	}

	var eig mat.EigenSym
	if !eig.Factorize(mat.NewSymDense(v, s), true) {
		return nil, fmt.Errorf("pca: eigendecomposition of the %d×%d covariance did not converge", v, v)
	}
	vals := eig.RawValues() // ascending
	q := eig.RawQ()

	p := &PCA{
		Rows:              n,
		Mean:              mean,
		Components:        make([][]float64, k),
		ExplainedVariance: make([]float64, k),
		TotalVariance:     total,
	}
	for i := 0; i < k; i++ {
		col := v - 1 - i
		comp := make([]float64, v)
		best := 0
		for r := 0; r < v; r++ {
			comp[r] = q.At(r, col)
			if math.Abs(comp[r]) > math.Abs(comp[best]) {
				best = r
			}
		}
		if comp[best] < 0 {
			for r := range comp {
				comp[r] = -comp[r]
			}
		}
		p.Components[i] = comp
		// Rounding can leave a zero eigenvalue slightly negative.
		p.ExplainedVariance[i] = math.Max(vals[col], 0)
	}
	return p, nil
}
