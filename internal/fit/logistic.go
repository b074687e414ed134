package fit

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"

	"github.com/modelgate/modelgate/internal/errkind"
)

// ErrSeparable is returned (marked bad input) when the maximum-likelihood
// logistic model does not exist or is not numerically identifiable: the
// classes are (quasi-)separable, so the linear predictor diverges, or the
// features are collinear, so the Hessian is singular.
var ErrSeparable = errors.New("logistic regression has no finite maximum-likelihood fit (separable classes or collinear features)")

// ErrNotConverged is returned when Newton's method did not reach the
// gradient tolerance within the iteration limit.
var ErrNotConverged = errors.New("logistic regression did not converge")

// LogisticOptions tune Logistic. The zero value means the defaults.
type LogisticOptions struct {
	// MaxIter bounds the Newton iterations (default 100).
	MaxIter int
	// Tol is the convergence threshold on the largest absolute component
	// of the log-likelihood gradient divided by the total sample weight
	// (default 1e-10).
	Tol float64
}

// LogisticModel is a fitted logistic regression:
// P(y=1 | x) = σ(Intercept + Σ Coef[j]·x[j]).
type LogisticModel struct {
	Coef      []float64
	Intercept float64
	// Iterations is the number of Newton steps taken.
	Iterations int
	// LogLoss is the weighted mean negative log-likelihood on the fitting
	// data at the solution.
	LogLoss float64
}

// maxLinearPredictor bounds |η| at any row: σ(36) rounds to 1 − 2.2e-16,
// so a larger |η| means a predicted probability indistinguishable from 0 or
// 1, which for an unregularised fit signals separation.
const maxLinearPredictor = 36

// stepTol bounds the largest Newton step, relative to 1 + the largest
// coefficient, at convergence.
const stepTol = 1e-7

// maxCond bounds the Hessian's condition number before the Newton system
// is declared singular.
const maxCond = 1e13

// Logistic fits an unregularised logistic regression with an intercept by
// Newton's method (iteratively reweighted least squares) in float64, with
// a Cholesky solve of the Newton system and step halving when a full step
// does not lower the loss. It stops when both the mean gradient (see
// LogisticOptions.Tol) and the Newton step (1e-7 relative to 1 + the
// largest coefficient) are small.
//
// x holds one row per sample; y the targets in [0,1]; w the sample weights
// (≥ 0, not all zero), or nil for weight 1 each. It returns ErrSeparable
// (bad input) when the linear predictor of some row exceeds ±36 or the
// Hessian is singular or worse conditioned than 1e13, and ErrNotConverged
// when the iteration limit is reached.
func Logistic(x *mat.Dense, y, w []float64, opt *LogisticOptions) (*LogisticModel, error) {
	n, p := x.Dims()
	maxIter, tol := 100, 1e-10
	if opt != nil {
		if opt.MaxIter > 0 {
			maxIter = opt.MaxIter
		}
		if opt.Tol > 0 {
			tol = opt.Tol
		}
	}
	if len(y) != n {
		return nil, errkind.New(errkind.BadInput, "logistic: %d targets for %d rows", len(y), n)
	}
	if w == nil {
		w = make([]float64, n)
		for i := range w {
			w[i] = 1
		}
	} else if len(w) != n {
		return nil, errkind.New(errkind.BadInput, "logistic: %d weights for %d rows", len(w), n)
	}
	sumW := 0.0
	for i := 0; i < n; i++ {
		if !(y[i] >= 0 && y[i] <= 1) {
			return nil, errkind.New(errkind.BadInput, "logistic: target %v at row %d outside [0,1]", y[i], i)
		}
		if !(w[i] >= 0) || math.IsInf(w[i], 0) {
			return nil, errkind.New(errkind.BadInput, "logistic: weight %v at row %d is negative or not finite", w[i], i)
		}
		for j, v := range x.RawRowView(i) {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, errkind.New(errkind.BadInput, "logistic: feature %d at row %d is %v", j, i, v)
			}
		}
		sumW += w[i]
	}
	if !(sumW > 0) {
		return nil, errkind.New(errkind.BadInput, "logistic: total sample weight is zero")
	}

	// Augmented design [x, 1]: the intercept is the last coefficient.
	d := p + 1
	beta := make([]float64, d)
	eta := make([]float64, n)
	z := mat.NewDense(n, d, nil)
	grad := make([]float64, d)
	var hess mat.SymDense
	var chol mat.Cholesky
	delta := mat.NewVecDense(d, nil)
	trial := make([]float64, d)

	predict := func(b []float64, out []float64) {
		for i := 0; i < n; i++ {
			s := b[p]
			for j, v := range x.RawRowView(i) {
				s += v * b[j]
			}
			out[i] = s
		}
	}
	loss := func(e []float64) float64 {
		l := 0.0
		for i := 0; i < n; i++ {
			l += w[i] * (softplus(e[i]) - y[i]*e[i])
		}
		return l / sumW
	}
	checkEta := func(e []float64) error {
		for i := range e {
			if math.Abs(e[i]) > maxLinearPredictor {
				return errkind.Wrap(errkind.BadInput, fmt.Errorf("logistic: row %d: linear predictor %.3g diverges: %w", i, e[i], ErrSeparable))
			}
		}
		return nil
	}

	predict(beta, eta)
	cur := loss(eta)
	trialEta := make([]float64, n)
	for it := 0; ; it++ {
		// Gradient of the log-likelihood and the weighted design for the Hessian.
		for j := range grad {
			grad[j] = 0
		}
		for i := 0; i < n; i++ {
			pi := sigmoid(eta[i])
			r := w[i] * (y[i] - pi)
			sq := math.Sqrt(w[i] * pi * (1 - pi))
			row := z.RawRowView(i)
			for j, xij := range x.RawRowView(i) {
				grad[j] += r * xij
				row[j] = sq * xij
			}
			grad[p] += r
			row[p] = sq
		}
		gmax := 0.0
		for _, g := range grad {
			gmax = math.Max(gmax, math.Abs(g))
		}
		hess.SymOuterK(1, z.T())
		if !chol.Factorize(&hess) || chol.Cond() > maxCond {
			return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("logistic: Hessian singular or ill-conditioned at iteration %d: %w", it, ErrSeparable))
		}
		if err := chol.SolveVecTo(delta, mat.NewVecDense(d, grad)); err != nil {
			return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("logistic: solving the Newton system: %w", ErrSeparable))
		}
		// Converged when the gradient vanishes and so does the Newton step:
		// on separable data the gradient also tends to zero, but the steps
		// stay large as the coefficients run off to infinity.
		bmax, smax := 0.0, 0.0
		for j := range beta {
			bmax = math.Max(bmax, math.Abs(beta[j]))
			smax = math.Max(smax, math.Abs(delta.AtVec(j)))
		}
		if gmax/sumW <= tol && smax <= stepTol*(1+bmax) {
			return &LogisticModel{Coef: beta[:p], Intercept: beta[p], Iterations: it, LogLoss: cur}, nil
		}
		if it == maxIter {
			return nil, fmt.Errorf("logistic: %w after %d iterations (largest mean gradient %.3g, step %.3g)", ErrNotConverged, it, gmax/sumW, smax)
		}
		// Step halving until the loss does not increase beyond its rounding
		// noise: near the optimum a Newton step lowers the loss by less than
		// float64 can resolve.
		slack := 1e-12 * (1 + math.Abs(cur))
		step := 1.0
		accepted := false
		for h := 0; h < 40; h++ {
			for j := range trial {
				trial[j] = beta[j] + step*delta.AtVec(j)
			}
			predict(trial, trialEta)
			if l := loss(trialEta); l <= cur+slack {
				if err := checkEta(trialEta); err != nil {
					return nil, err
				}
				copy(beta, trial)
				eta, trialEta = trialEta, eta
				cur = l
				accepted = true
				break
			}
			step /= 2
		}
		if !accepted {
			// No step lowers the loss: we are at the floor set by rounding.
			if gmax/sumW <= 1e3*tol && smax <= 1e3*stepTol*(1+bmax) {
				return &LogisticModel{Coef: beta[:p], Intercept: beta[p], Iterations: it, LogLoss: cur}, nil
			}
			return nil, fmt.Errorf("logistic: %w: no descent at iteration %d (largest mean gradient %.3g)", ErrNotConverged, it, gmax/sumW)
		}
	}
}

func sigmoid(e float64) float64 {
	if e >= 0 {
		return 1 / (1 + math.Exp(-e))
	}
	t := math.Exp(e)
	return t / (1 + t)
}

// softplus is log(1 + e^x) without overflow.
func softplus(e float64) float64 {
	if e > 0 {
		return e + math.Log1p(math.Exp(-e))
	}
	return math.Log1p(math.Exp(e))
}
