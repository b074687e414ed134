package listening

import (
	"math"
	"math/rand/v2"
	"testing"
)

// TestRows draws benchmark-sized rows and checks them against the model's
// own parameters: distinct ids inside the catalogue, plays within
// 1..MaxPlays, regular rows within 1..MaxFollowed with the mean the model
// implies (1 + FollowsPerSession × 4 sessions a week, the Gamma(2, 1)×2
// mean), anomalous rows within AnomalyMin..AnomalyMax at about AnomalyRate,
// and popular shows played more often than rare ones.
func TestRows(t *testing.T) {
	m := Default()
	const n, shows = 40000, 32768
	indptr, idx, plays := m.Rows(rand.New(rand.NewPCG(1, 2)), n, shows)
	if len(indptr) != n+1 || len(idx) != len(plays) || int(indptr[n]) != len(idx) {
		t.Fatalf("shape: %d indptr, %d indices, %d plays", len(indptr), len(idx), len(plays))
	}
	regular, regularNNZ, anomalous := 0, 0, 0
	hits := make([]int, shows)
	for r := 0; r < n; r++ {
		row := idx[indptr[r]:indptr[r+1]]
		seen := map[int32]bool{}
		for _, j := range row {
			if j < 0 || int(j) >= shows || seen[j] {
				t.Fatalf("row %d: id %d out of range or repeated", r, j)
			}
			seen[j] = true
			hits[j]++
		}
		switch k := len(row); {
		case k >= m.AnomalyMin:
			anomalous++
			if k > m.AnomalyMax {
				t.Errorf("row %d: %d shows", r, k)
			}
		case k >= 1 && k <= m.MaxFollowed:
			regular++
			regularNNZ += k
		default:
			t.Errorf("row %d: %d shows", r, k)
		}
	}
	for _, p := range plays {
		if p < 1 || p > float32(m.MaxPlays) || p != float32(math.Round(float64(p))) {
			t.Fatalf("plays %v outside 1..%d", p, m.MaxPlays)
		}
	}
	want := 1 + m.FollowsPerSession*4
	if mean := float64(regularNNZ) / float64(regular); math.Abs(mean-want) > 0.1 {
		t.Errorf("mean shows per regular row %.3f, the model implies %.3f", mean, want)
	}
	if rate := float64(anomalous) / n; math.Abs(rate-m.AnomalyRate) > 0.001 {
		t.Errorf("anomalous rate %.4f, the model's %.4f", rate, m.AnomalyRate)
	}
	if top, tail := hits[0], hits[shows/2]; top < 50*max(tail, 1) {
		t.Errorf("the most popular show has %d plays, a mid-catalogue one %d", top, tail)
	}
}

// TestPoissonMean: the sample mean and variance of poisson(λ) match λ (a
// Poisson law's mean and variance are both λ) within five standard errors.
func TestPoissonMean(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	for _, lambda := range []float64{0.5, 3.3, 20} {
		const n = 200000
		s, s2 := 0.0, 0.0
		for range n {
			k := float64(poisson(r, lambda))
			s += k
			s2 += k * k
		}
		mean := s / n
		v := s2/n - mean*mean
		if se := math.Sqrt(lambda / n); math.Abs(mean-lambda) > 5*se {
			t.Errorf("λ=%v: mean %.4f", lambda, mean)
		}
		if math.Abs(v-lambda) > 0.05*lambda {
			t.Errorf("λ=%v: variance %.4f", lambda, v)
		}
	}
	if poisson(r, 0) != 0 {
		t.Error("poisson(0) ≠ 0")
	}
}
