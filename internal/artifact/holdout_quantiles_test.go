package artifact

import (
	"math"
	"testing"
)

// TestCountQuantiles: the holdout summary's quantiles of pairs per row,
// from a histogram, equal numpy's default quantile (Hyndman & Fan type 7).
// Reference values (shared references list, numpy): x = [1,2,3,4,5,100]
// gives q.5 = 3.5, q.9 = 52.5, q.99 = 95.25.
func TestCountQuantiles(t *testing.T) {
	hist := map[int]int64{1: 1, 2: 1, 3: 1, 4: 1, 5: 1, 100: 1}
	q := countQuantiles(hist, 6)
	for k, want := range map[string]float64{"q50": 3.5, "q90": 52.5, "q99": 95.25} {
		if math.Abs(q[k]-want) > 1e-12 {
			t.Errorf("%s = %v, numpy gives %v", k, q[k], want)
		}
	}
	// Repeated values: [2,2,2,7] → type 7 q.5 = 2, q.9 = 2 + 0.7·5 = 5.5.
	q = countQuantiles(map[int]int64{2: 3, 7: 1}, 4)
	if q["q50"] != 2 || math.Abs(q["q90"]-5.5) > 1e-12 {
		t.Errorf("repeated values: %v", q)
	}
	if countQuantiles(nil, 0) != nil {
		t.Error("no rows should give no quantiles")
	}
}
