package fit

import (
	"encoding/json"
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"

	"github.com/modelgate/modelgate/internal/errkind"
)

// logisticData draws a seeded data set from a logistic model with the
// given true coefficients and intercept; features have unequal scales.
func logisticData(seed uint64, n int, coef []float64, intercept float64, weighted bool) (*mat.Dense, []float64, []float64) {
	r := rand.New(rand.NewPCG(seed, 11))
	p := len(coef)
	x := mat.NewDense(n, p, nil)
	y := make([]float64, n)
	var w []float64
	if weighted {
		w = make([]float64, n)
	}
	for i := 0; i < n; i++ {
		eta := intercept
		for j := 0; j < p; j++ {
			v := r.NormFloat64() * float64(j+1)
			x.Set(i, j, v)
			eta += coef[j] * v
		}
		if r.Float64() < sigmoid(eta) {
			y[i] = 1
		}
		if weighted {
			w[i] = 0.5 + 2*r.Float64()
		}
	}
	return x, y, w
}

// TestLogisticAgainstScikitLearn compares coefficients and intercept with
// scikit-learn 1.2's LogisticRegression(penalty=None, tol=1e-10,
// max_iter=10000) — the unregularised fit; 1.2 spells it None and warns
// that 'none' is deprecated — with solvers lbfgs and newton-cg, within 1e-4.
func TestLogisticAgainstScikitLearn(t *testing.T) {
	for _, tc := range []struct {
		name      string
		seed      uint64
		n         int
		coef      []float64
		intercept float64
		weighted  bool
	}{
		{"unweighted", 1, 600, []float64{0.8, -0.4, 0.1}, -1.2, false},
		{"weighted", 2, 1500, []float64{0.3, 0.05, -0.2, 0.15, 0.0}, 0.4, true},
		{"rare positives", 3, 3000, []float64{0.5, -0.1}, -3, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			x, y, w := logisticData(tc.seed, tc.n, tc.coef, tc.intercept, tc.weighted)
			m, err := Logistic(x, y, w, nil)
			if err != nil {
				t.Fatal(err)
			}
			rows := make([][]float64, tc.n)
			for i := range rows {
				rows[i] = x.RawRowView(i)
			}
			in, _ := json.Marshal(map[string]any{"x": rows, "y": y, "w": w})
			out := runPython(t, []string{"numpy", "sklearn"}, `
import json, sys, numpy as np
from sklearn.linear_model import LogisticRegression
d = json.load(sys.stdin)
x = np.array(d["x"]); y = np.array(d["y"]); w = None if d["w"] is None else np.array(d["w"])
res = {}
for solver in ("lbfgs", "newton-cg"):
    m = LogisticRegression(penalty=None, solver=solver, tol=1e-10, max_iter=10000).fit(x, y, sample_weight=w)
    res[solver] = {"coef": m.coef_[0].tolist(), "intercept": float(m.intercept_[0])}
json.dump(res, sys.stdout)
`, in)
			var want map[string]struct {
				Coef      []float64
				Intercept float64
			}
			if err := json.Unmarshal(out, &want); err != nil {
				t.Fatal(err)
			}
			for solver, ref := range want {
				for j := range ref.Coef {
					if math.Abs(m.Coef[j]-ref.Coef[j]) > 1e-4 {
						t.Errorf("%s: coef[%d] = %v, scikit-learn %v", solver, j, m.Coef[j], ref.Coef[j])
					}
				}
				if math.Abs(m.Intercept-ref.Intercept) > 1e-4 {
					t.Errorf("%s: intercept = %v, scikit-learn %v", solver, m.Intercept, ref.Intercept)
				}
			}
		})
	}
}

// TestLogisticOptimality checks the defining property of the fit without
// an outside reference: the log-likelihood gradient vanishes, so the
// weighted mean prediction equals the weighted mean label and the weighted
// residuals are orthogonal to each feature.
func TestLogisticOptimality(t *testing.T) {
	x, y, w := logisticData(9, 2000, []float64{1, -0.5, 0.25}, 0.3, true)
	m, err := Logistic(x, y, w, nil)
	if err != nil {
		t.Fatal(err)
	}
	n, p := x.Dims()
	g := make([]float64, p+1)
	sw := 0.0
	loss := 0.0
	for i := 0; i < n; i++ {
		eta := m.Intercept
		for j := 0; j < p; j++ {
			eta += m.Coef[j] * x.At(i, j)
		}
		pi := sigmoid(eta)
		for j := 0; j < p; j++ {
			g[j] += w[i] * (y[i] - pi) * x.At(i, j)
		}
		g[p] += w[i] * (y[i] - pi)
		sw += w[i]
		loss -= w[i] * (y[i]*math.Log(pi) + (1-y[i])*math.Log(1-pi))
	}
	for j, v := range g {
		if math.Abs(v/sw) > 1e-9 {
			t.Errorf("gradient[%d]/Σw = %v", j, v/sw)
		}
	}
	if math.Abs(loss/sw-m.LogLoss) > 1e-12 {
		t.Errorf("reported log loss %v, recomputed %v", m.LogLoss, loss/sw)
	}
	// Moving any coefficient a little raises the loss.
	if m.Iterations < 2 || m.Iterations > 30 {
		t.Errorf("Newton took %d iterations", m.Iterations)
	}
}

func TestLogisticRefusesSeparableAndCollinear(t *testing.T) {
	// Perfectly separated by the sign of the feature.
	sep := mat.NewDense(6, 1, []float64{-3, -2, -1, 1, 2, 3})
	ySep := []float64{0, 0, 0, 1, 1, 1}
	// One class only: the intercept diverges.
	yOne := []float64{1, 1, 1, 1, 1, 1}
	// Quasi-complete separation: x > 0 always positive, overlap at x = 0.
	quasi := mat.NewDense(8, 1, []float64{-2, -1, 0, 0, 0, 0, 1, 2})
	yQuasi := []float64{0, 0, 0, 1, 0, 1, 1, 1}
	// Two identical columns.
	r := rand.New(rand.NewPCG(5, 5))
	col := mat.NewDense(50, 2, nil)
	yCol := make([]float64, 50)
	for i := 0; i < 50; i++ {
		v := r.NormFloat64()
		col.Set(i, 0, v)
		col.Set(i, 1, v)
		yCol[i] = float64(i % 2)
	}
	for _, tc := range []struct {
		name string
		x    *mat.Dense
		y    []float64
	}{
		{"separable", sep, ySep}, {"one class", sep, yOne}, {"quasi-separable", quasi, yQuasi}, {"collinear", col, yCol},
	} {
		_, err := Logistic(tc.x, tc.y, nil, nil)
		if !errors.Is(err, ErrSeparable) || !errkind.Is(err, errkind.BadInput) {
			t.Errorf("%s: err %v, want ErrSeparable marked bad input", tc.name, err)
		}
	}
}

func TestLogisticBadInput(t *testing.T) {
	x := mat.NewDense(3, 1, []float64{1, 2, 3})
	for _, tc := range []struct {
		name string
		y, w []float64
	}{
		{"label out of range", []float64{0, 2, 1}, nil},
		{"negative weight", []float64{0, 1, 1}, []float64{1, -1, 1}},
		{"zero weights", []float64{0, 1, 1}, []float64{0, 0, 0}},
		{"short labels", []float64{0, 1}, nil},
	} {
		if _, err := Logistic(x, tc.y, tc.w, nil); !errkind.Is(err, errkind.BadInput) {
			t.Errorf("%s: err %v, want bad input", tc.name, err)
		}
	}
	nan := mat.NewDense(3, 1, []float64{1, math.NaN(), 3})
	if _, err := Logistic(nan, []float64{0, 1, 0}, nil, nil); !errkind.Is(err, errkind.BadInput) {
		t.Errorf("NaN feature: err %v, want bad input", err)
	}
	_, err := Logistic(mat.NewDense(4, 1, []float64{-1, 1, -2, 2}), []float64{0, 1, 1, 0}, nil, &LogisticOptions{MaxIter: 1, Tol: 1e-300})
	if !errors.Is(err, ErrNotConverged) {
		t.Errorf("one iteration at an unreachable tolerance: err %v, want ErrNotConverged", err)
	}
}
