package fit

import "testing"

// BenchmarkFitPCA fits 16 components of a 24,000×1,000 activity-like matrix:
// the size of the demo's encoders (the eigendecomposition dominates).
func BenchmarkFitPCA(b *testing.B) {
	x := randomSparse(1, 24000, 1000, 8)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := FitPCA(x, 16); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkLogistic fits 24,000 rows × 27 features.
func BenchmarkLogistic(b *testing.B) {
	coef := make([]float64, 27)
	for j := range coef {
		coef[j] = 0.3 / float64(j+1)
	}
	x, y, _ := logisticData(2, 24000, coef, -2, false)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := Logistic(x, y, nil, nil); err != nil {
			b.Fatal(err)
		}
	}
}
