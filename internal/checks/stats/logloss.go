package stats

import (
	"math"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Eps is the clipping bound of every logarithm in this package: a
// probability p is replaced by min(max(p, Eps), 1−Eps), computed in float64,
// before log(p) or log(1−p) is taken, so a confidently wrong prediction
// costs at most about 34.54 nats instead of +Inf (−log(1 − fl(1−Eps)) =
// 34.5392 for p = 1, y = 0, since 1−Eps rounds in float64; −log(Eps) =
// 34.5388 for p = 0, y = 1).
//
// The value is scikit-learn's former default (log_loss(eps=1e-15), the
// default up to version 1.2); version 1.2 itself clips with float64 machine
// epsilon, which gives slightly different losses for p exactly 0 or 1.
const Eps = 1e-15

// Float is the element type of the input slices: float32 (as the runtime
// produces) or float64.
type Float interface{ ~float32 | ~float64 }

// Clip returns p limited to [Eps, 1−Eps]; NaN stays NaN.
func Clip(p float64) float64 {
	// Two predictable branches: cheaper than the min/max builtins, whose
	// NaN and signed-zero rules cost a dozen instructions.
	if p < Eps {
		p = Eps
	}
	if p > 1-Eps {
		p = 1 - Eps
	}
	return p
}

// LogLoss returns the log loss of one prediction p of label y:
// −(y·log(Clip(p)) + (1−y)·log(1−Clip(p))). y may be fractional (a soft
// label in [0, 1]); for y 0 or 1 only one logarithm is taken and the result
// is bit-identical to the two-term form.
func LogLoss(p, y float64) float64 {
	pc := Clip(p)
	if y == 0 || y == 1 {
		return -math.Log(y*pc + (1-y)*(1-pc))
	}
	return -(y*math.Log(pc) + (1-y)*math.Log(1-pc))
}

// binaryLoss is LogLoss for y known to be 0 or 1: y·pc + (1−y)·(1−pc) is
// exactly pc or 1−pc, so one logarithm and no branch on y.
func binaryLoss(p, y float64) float64 {
	pc := Clip(p)
	return -math.Log(y*pc + (1-y)*(1-pc))
}

// softLoss is LogLoss with both logarithms and no branch on y.
func softLoss(p, y float64) float64 {
	pc := Clip(p)
	return -(y*math.Log(pc) + (1-y)*math.Log(1-pc))
}

// checkRows validates a batch of (p, y, w) rows: equal lengths (w may be
// nil), p and y in [0, 1], w finite and >= 0. It reports whether every
// label is exactly 0 or 1. what names the probability column in errors.
func checkRows[T Float](p, y, w []T, what string) (binary bool, err error) {
	if len(y) != len(p) {
		return false, errkind.New(errkind.BadInput, "%d labels for %d %s", len(y), len(p), what)
	}
	if w != nil && len(w) != len(p) {
		return false, errkind.New(errkind.BadInput, "%d weights for %d %s", len(w), len(p), what)
	}
	y = y[:len(p)]
	soft := false // a label other than 0 and 1 (-0 counts as 0)
	for i := range p {
		if !(p[i] >= 0 && p[i] <= 1) {
			return false, errkind.New(errkind.BadInput, "row %d: %s %v outside [0, 1]", i, what, p[i])
		}
		yi := float64(y[i])
		if !(yi >= 0 && yi <= 1) {
			return false, errkind.New(errkind.BadInput, "row %d: label %v outside [0, 1]", i, yi)
		}
		if yi != 0 && yi != 1 {
			soft = true
		}
	}
	return !soft, checkWeights(w)
}

// checkWeights refuses a weight that is negative, NaN or infinite.
func checkWeights[T Float](w []T) error {
	for i, wi := range w {
		if !(wi >= 0 && float64(wi) <= math.MaxFloat64) {
			return errkind.New(errkind.BadInput, "row %d: weight %v is not a finite number >= 0", i, wi)
		}
	}
	return nil
}

// entropy is the binary entropy in nats of a Bernoulli(p); 0 at p 0 or 1.
func entropy(p float64) float64 {
	if p <= 0 || p >= 1 {
		return 0
	}
	return -(p*math.Log(p) + (1-p)*math.Log(1-p))
}
