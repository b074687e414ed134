package fit

import (
	"math"
	"testing"
)

func TestQuantiles(t *testing.T) {
	// REFERENCES.md, numpy's default quantile (Hyndman & Fan type 7,
	// "linear"): x=[1,2,3,4,5,100] → q.5 = 3.5, q.9 = 52.5, q.99 = 95.25.
	x := []float64{100, 2, 5, 1, 4, 3} // unsorted on purpose
	got := Quantiles(x, []float64{0.5, 0.9, 0.99, 0, 1})
	want := []float64{3.5, 52.5, 95.25, 1, 100}
	for i := range want {
		if math.Abs(got[i]-want[i]) > 1e-12*math.Abs(want[i]) {
			t.Errorf("q[%d] = %v, want %v", i, got[i], want[i])
		}
	}
	if x[0] != 100 {
		t.Error("Quantiles sorted its input in place")
	}
	if g := Quantiles([]float64{7}, []float64{0.3}); g[0] != 7 {
		t.Errorf("single value: %v", g)
	}
	if g := Quantiles(nil, []float64{0.5}); !math.IsNaN(g[0]) {
		t.Errorf("empty input: %v, want NaN", g)
	}
	if g := Quantiles(x, []float64{1.5}); !math.IsNaN(g[0]) {
		t.Errorf("q=1.5: %v, want NaN", g)
	}
}
