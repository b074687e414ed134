package fit

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
)

// randomSparse makes a seeded rows×cols matrix with a few dominant latent
// directions, so that the leading eigenvalues are well separated.
func randomSparse(seed uint64, rows, cols, latent int) *Sparse {
	r := rand.New(rand.NewPCG(seed, 7))
	dirs := make([][]float64, latent)
	for l := range dirs {
		dirs[l] = make([]float64, cols)
		for c := range dirs[l] {
			dirs[l][c] = r.NormFloat64()
		}
	}
	s := &Sparse{Rows: rows, Cols: cols, Indptr: []int{0}}
	for i := 0; i < rows; i++ {
		z := make([]float64, latent)
		for l := range z {
			z[l] = r.NormFloat64() * float64(latent-l) // decreasing scales
		}
		for c := 0; c < cols; c++ {
			if r.Float64() < 0.7 {
				continue
			}
			v := 0.0
			for l := range z {
				v += z[l] * dirs[l][c]
			}
			s.Indices = append(s.Indices, c)
			s.Values = append(s.Values, math.Log1p(math.Abs(v)+r.Float64()))
		}
		s.Indptr = append(s.Indptr, len(s.Indices))
	}
	return s
}

func (s *Sparse) dense() [][]float64 {
	d := make([][]float64, s.Rows)
	for r := range d {
		d[r] = make([]float64, s.Cols)
		for i := s.Indptr[r]; i < s.Indptr[r+1]; i++ {
			d[r][s.Indices[i]] = s.Values[i]
		}
	}
	return d
}

// TestPCAAgainstNumpy compares components and explained variance with
// numpy's SVD of the centred dense matrix (numpy 1.24, numpy.linalg.svd;
// explained variance s²/(n−1), the convention of scikit-learn's PCA),
// up to the sign of each component, within 1e-6.
func TestPCAAgainstNumpy(t *testing.T) {
	for _, tc := range []struct {
		name             string
		rows, cols, k, l int
	}{
		{"narrow", 300, 12, 5, 4},
		{"wide", 800, 150, 8, 6},
	} {
		t.Run(tc.name, func(t *testing.T) {
			x := randomSparse(uint64(tc.rows), tc.rows, tc.cols, tc.l)
			in, _ := json.Marshal(map[string]any{"x": x.dense(), "k": tc.k})
			out := runPython(t, []string{"numpy"}, `
import json, sys, numpy as np
d = json.load(sys.stdin)
x = np.array(d["x"], dtype=np.float64); k = d["k"]
xc = x - x.mean(axis=0)
u, s, vt = np.linalg.svd(xc, full_matrices=False)
json.dump({"components": vt[:k].tolist(), "variance": (s[:k]**2/(x.shape[0]-1)).tolist(),
           "total": float(xc.var(axis=0, ddof=1).sum()), "mean": x.mean(axis=0).tolist()}, sys.stdout)
`, in)
			var want struct {
				Components [][]float64
				Variance   []float64
				Total      float64
				Mean       []float64
			}
			if err := json.Unmarshal(out, &want); err != nil {
				t.Fatal(err)
			}
			p, err := FitPCA(x, tc.k)
			if err != nil {
				t.Fatal(err)
			}
			for c := range want.Mean {
				if d := math.Abs(p.Mean[c] - want.Mean[c]); d > 1e-12 {
					t.Errorf("mean[%d] = %v, numpy %v", c, p.Mean[c], want.Mean[c])
				}
			}
			if d := math.Abs(p.TotalVariance-want.Total) / want.Total; d > 1e-9 {
				t.Errorf("total variance %v, numpy %v", p.TotalVariance, want.Total)
			}
			for i := 0; i < tc.k; i++ {
				if d := math.Abs(p.ExplainedVariance[i]-want.Variance[i]) / want.Variance[i]; d > 1e-6 {
					t.Errorf("explained variance[%d] = %v, numpy %v", i, p.ExplainedVariance[i], want.Variance[i])
				}
				sign := 1.0
				if dot(p.Components[i], want.Components[i]) < 0 {
					sign = -1
				}
				for c := range want.Components[i] {
					if d := math.Abs(p.Components[i][c] - sign*want.Components[i][c]); d > 1e-6 {
						t.Fatalf("component %d entry %d = %v, numpy %v (sign %v)", i, c, p.Components[i][c], want.Components[i][c], sign)
					}
				}
			}
		})
	}
}

func dot(a, b []float64) float64 {
	s := 0.0
	for i := range a {
		s += a[i] * b[i]
	}
	return s
}

// TestPCASmithTutorial checks the worked example of Lindsay I. Smith, "A
// tutorial on Principal Components Analysis" (2002), section 3: the 2-D
// data set x, y below has eigenvalues .0490833989 and 1.28402771 and
// eigenvectors (−.735178656, .677873399) and (−.677873399, −.735178656).
// The numbers were recalled from the tutorial and confirmed with numpy
// 1.24 (numpy.linalg.eigh of numpy.cov); the tolerance follows their nine
// printed digits.
func TestPCASmithTutorial(t *testing.T) {
	xs := []float64{2.5, 0.5, 2.2, 1.9, 3.1, 2.3, 2, 1, 1.5, 1.1}
	ys := []float64{2.4, 0.7, 2.9, 2.2, 3.0, 2.7, 1.6, 1.1, 1.6, 0.9}
	m := &Sparse{Rows: len(xs), Cols: 2, Indptr: []int{0}}
	for i := range xs {
		m.Indices = append(m.Indices, 0, 1)
		m.Values = append(m.Values, xs[i], ys[i])
		m.Indptr = append(m.Indptr, len(m.Indices))
	}
	p, err := FitPCA(m, 2)
	if err != nil {
		t.Fatal(err)
	}
	wantVal := []float64{1.28402771, .0490833989}
	// Our sign convention (largest |entry| positive) applied to the tutorial's vectors.
	wantVec := [][]float64{{.677873399, .735178656}, {.735178656, -.677873399}}
	for i := range wantVal {
		if math.Abs(p.ExplainedVariance[i]-wantVal[i]) > 1e-8 {
			t.Errorf("eigenvalue %d = %.10g, tutorial %.10g", i, p.ExplainedVariance[i], wantVal[i])
		}
		for c := range wantVec[i] {
			if math.Abs(p.Components[i][c]-wantVec[i][c]) > 1e-9 {
				t.Errorf("eigenvector %d = %v, tutorial %v", i, p.Components[i], wantVec[i])
			}
		}
	}
}

func TestPCASignConventionAndTruncate(t *testing.T) {
	x := randomSparse(3, 200, 20, 3)
	p, err := FitPCA(x, 6)
	if err != nil {
		t.Fatal(err)
	}
	for i, comp := range p.Components {
		best := 0
		norm := 0.0
		for c, v := range comp {
			norm += v * v
			if math.Abs(v) > math.Abs(comp[best]) {
				best = c
			}
		}
		if comp[best] <= 0 {
			t.Errorf("component %d: largest entry %v is not positive", i, comp[best])
		}
		if math.Abs(norm-1) > 1e-12 {
			t.Errorf("component %d: squared norm %v", i, norm)
		}
		if i > 0 && p.ExplainedVariance[i] > p.ExplainedVariance[i-1] {
			t.Errorf("explained variance not decreasing at %d", i)
		}
	}
	q, err := FitPCA(x, 3)
	if err != nil {
		t.Fatal(err)
	}
	tr, err := p.Truncate(3)
	if err != nil {
		t.Fatal(err)
	}
	for i := range q.Components {
		for c := range q.Components[i] {
			if q.Components[i][c] != tr.Components[i][c] {
				t.Fatalf("truncated component %d differs from a 3-component fit", i)
			}
		}
	}
	if _, err := p.Truncate(7); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("Truncate(7) of 6 components: %v, want bad input", err)
	}
}

func TestPCABadInput(t *testing.T) {
	good := randomSparse(4, 10, 5, 2)
	dup := &Sparse{Rows: 2, Cols: 3, Indptr: []int{0, 2, 3}, Indices: []int{1, 1, 0}, Values: []float64{1, 2, 3}}
	nan := &Sparse{Rows: 2, Cols: 3, Indptr: []int{0, 1, 2}, Indices: []int{1, 0}, Values: []float64{math.NaN(), 2}}
	oob := &Sparse{Rows: 2, Cols: 3, Indptr: []int{0, 1, 2}, Indices: []int{3, 0}, Values: []float64{1, 2}}
	short := &Sparse{Rows: 2, Cols: 3, Indptr: []int{0, 1}, Indices: []int{0}, Values: []float64{1}}
	one := &Sparse{Rows: 1, Cols: 3, Indptr: []int{0, 1}, Indices: []int{0}, Values: []float64{1}}
	for _, tc := range []struct {
		name string
		x    *Sparse
		k    int
	}{
		{"duplicate column", dup, 1}, {"nan", nan, 1}, {"column out of range", oob, 1},
		{"short indptr", short, 1}, {"one row", one, 1}, {"k zero", good, 0}, {"k too big", good, 6},
	} {
		if _, err := FitPCA(tc.x, tc.k); !errkind.Is(err, errkind.BadInput) {
			t.Errorf("%s: err %v, want bad input", tc.name, err)
		}
	}
	if err := good.Validate(); err != nil {
		t.Errorf("valid matrix refused: %v", err)
	}
}
