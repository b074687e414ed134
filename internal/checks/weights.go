package checks

import (
	"fmt"
	"math"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/score"
)

// Where the rows' slices and weights come from. The candidate never
// chooses them: a candidate whose stats.json is edited would otherwise move
// rows into or out of the down-weighted group and so choose the numbers it
// is judged on. With a baseline, the thresholds are the baseline's
// training quantiles (what serves now, already released); on a first
// release, or when the baseline's statistics lack them, the holdout's own
// summary (quantiles of pairs per row, computed when it was pushed).
const (
	WeightsFromBaseline = "baseline"
	WeightsFromHoldout  = "holdout"
	WeightsFromNone     = "none"
)

// RowWeights says how rows were sliced and weighted for the decision.
type RowWeights struct {
	// Source: "baseline" (its stats.json), "holdout" (its summary) or
	// "none" (no quantiles found: rows are not sliced or weighted by their
	// nonzero count).
	Source string `json:"source"`
	// From names the artifact the quantiles were read from.
	From string `json:"from,omitempty"`
	// AnomalyAbove: rows with more nonzeros are the anomalous slice and
	// weigh AnomalyWeight in the overall figures (scorers; nil: none).
	AnomalyAbove  *float64 `json:"anomalyAbove,omitempty"`
	AnomalyWeight float64  `json:"anomalyWeight,omitempty"`
	// DownWeightAbove (encoders): rows with n nonzeros above it weigh
	// (DownWeightAbove/n)^DownWeightPower.
	DownWeightAbove *float64 `json:"downWeightAbove,omitempty"`
	DownWeightPower float64  `json:"downWeightPower,omitempty"`
	// HoldoutWeights: the holdout has a weight column, multiplied in.
	HoldoutWeights bool `json:"holdoutWeights,omitempty"`
}

// Describe says in words where the weights came from.
func (w RowWeights) Describe() string {
	switch w.Source {
	case WeightsFromBaseline:
		return "the baseline's training statistics (stats.json of " + w.From + ")"
	case WeightsFromHoldout:
		return "the holdout's summary (" + w.From + ")"
	}
	return "no quantiles (rows not sliced or weighted by nonzero count)"
}

// Weighted reports whether the weighted figures can differ from the plain
// ones.
func (w RowWeights) Weighted() bool {
	return (w.AnomalyAbove != nil && w.AnomalyWeight != 1) || w.DownWeightAbove != nil && w.DownWeightPower != 0 || w.HoldoutWeights
}

// quantileSource returns the statistics the nonzero quantiles are read
// from (in stats.json's shape) and their provenance.
func quantileSource(base *score.Model, hold *artifact.Holdout) (map[string]any, RowWeights) {
	if base != nil {
		if _, ok := base.Loaded.Stats["nonzerosPerRow"].(map[string]any); ok {
			return base.Loaded.Stats, RowWeights{Source: WeightsFromBaseline, From: base.Loaded.Artifact.Desc.Digest.String()}
		}
	}
	if q := hold.Info.NonzerosPerRow; len(q) > 0 {
		nz := map[string]any{}
		for k, v := range q {
			nz[k] = v
		}
		return map[string]any{"nonzerosPerRow": nz}, RowWeights{Source: WeightsFromHoldout, From: hold.Artifact.Desc.Digest.String()}
	}
	return nil, RowWeights{Source: WeightsFromNone}
}

// sourceName names the quantiles' source in findings.
func sourceName(w RowWeights) string {
	switch w.Source {
	case WeightsFromBaseline:
		return "the baseline's stats.json"
	case WeightsFromHoldout:
		return "the holdout's summary"
	}
	return "neither the baseline's stats.json nor the holdout's summary"
}

func missingQuantile(w RowWeights, q float64, what string) Finding {
	return Finding{Status: StatusWarn, Code: "holdout.stats",
		Message: fmt.Sprintf("%s has no nonzerosPerRow quantile %g: %s", sourceName(w), q, what)}
}

// plainLoss sums per-row losses without any weight: the plain mean log
// loss, what scikit-learn's log_loss computes with no sample_weight.
// Neumaier-compensated sums; mergeable (shards).
type plainLoss struct {
	N  int64   `json:"n"`
	C  float64 `json:"c"`  // candidate sum
	CC float64 `json:"cc"` // its compensation
	B  float64 `json:"b"`  // baseline sum
	BC float64 `json:"bc"` // its compensation
}

func neumaier(s, c *float64, x float64) {
	t := *s + x
	if math.Abs(*s) >= math.Abs(x) {
		*c += (*s - t) + x
	} else {
		*c += (x - t) + *s
	}
	*s = t
}

func (p *plainLoss) add(c, b float64) {
	p.N++
	neumaier(&p.C, &p.CC, c)
	neumaier(&p.B, &p.BC, b)
}

func (p *plainLoss) merge(o *plainLoss) {
	if o == nil {
		return
	}
	p.N += o.N
	neumaier(&p.C, &p.CC, o.C)
	neumaier(&p.C, &p.CC, o.CC)
	neumaier(&p.B, &p.BC, o.B)
	neumaier(&p.B, &p.BC, o.BC)
}

// mean returns the candidate's (or the baseline's) plain mean loss.
func (p *plainLoss) mean(candidate bool) float64 {
	if p == nil || p.N == 0 {
		return 0
	}
	if candidate {
		return (p.C + p.CC) / float64(p.N)
	}
	return (p.B + p.BC) / float64(p.N)
}

// weightedPart is the summary's note on the weighted figures: empty when
// weights cannot change anything (or for encoders, whose reconstruction
// loss is always the weighted one).
func weightedPart(det *HoldoutDetail, w RowWeights) string {
	if det.Kind != model.KindScorer || !w.Weighted() {
		return ""
	}
	if det.Baseline == nil {
		return fmt.Sprintf(" (weighted %.5f; weights from %s)", det.Candidate.WeightedLogLoss, sourceName(w))
	}
	return fmt.Sprintf(" (weighted %.5f vs %.5f; weights from %s)", det.Candidate.WeightedLogLoss, det.Baseline.WeightedLogLoss, sourceName(w))
}
