package stats

import (
	"cmp"
	"math"
	"slices"

	"github.com/modelgate/modelgate/internal/errkind"
)

// ExactAUC returns the area under the ROC curve of scores against labels:
// the weighted Mann–Whitney statistic Σ w_i·w_j·[s_i > s_j] (a tie counting
// ½) over positive i and negative j, divided by P·N, the total positive and
// negative weight. It equals scikit-learn's roc_auc_score with
// sample_weight for 0/1 labels. A fractional label y counts as w·y positive
// and w·(1−y) negative weight, as in Binary. weight may be nil for unit
// weights.
//
// It sorts a copy of the row order (O(n log n) time, O(n) memory): meant
// for small data and for checking Binary.AUC. Errors (kind
// errkind.BadInput): unequal lengths, a NaN score, a label outside [0, 1],
// a weight that is negative or not finite. The result is NaN when P or N
// is 0.
func ExactAUC[T Float](score, label, weight []T) (float64, error) {
	if len(label) != len(score) || (weight != nil && len(weight) != len(score)) {
		return 0, errkind.New(errkind.BadInput, "%d scores, %d labels, %d weights", len(score), len(label), len(weight))
	}
	for i := range score {
		if score[i] != score[i] {
			return 0, errkind.New(errkind.BadInput, "row %d: score is NaN", i)
		}
		if !(label[i] >= 0 && label[i] <= 1) {
			return 0, errkind.New(errkind.BadInput, "row %d: label %v outside [0, 1]", i, label[i])
		}
	}
	if err := checkWeights(weight); err != nil {
		return 0, err
	}
	idx := make([]int, len(score))
	for i := range idx {
		idx[i] = i
	}
	slices.SortFunc(idx, func(a, b int) int { return cmp.Compare(score[a], score[b]) })
	var area, neg, pos ksum
	for lo := 0; lo < len(idx); {
		hi := lo
		var pg, ng ksum
		for ; hi < len(idx) && score[idx[hi]] == score[idx[lo]]; hi++ {
			i := idx[hi]
			w := 1.0
			if weight != nil {
				w = float64(weight[i])
			}
			y := float64(label[i])
			pg.add(w * y)
			ng.add(w * (1 - y))
		}
		area.add(pg.value() * (neg.value() + 0.5*ng.value()))
		neg.merge(ng)
		pos.merge(pg)
		lo = hi
	}
	pn := pos.value() * neg.value()
	if pn == 0 {
		return math.NaN(), nil
	}
	return area.value() / pn, nil
}
