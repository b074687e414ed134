// Package listening is the listening model of modelgate's demo podcast
// network: how many shows a listener follows, how popular each show is,
// how many episodes a listener plays of a show, and the anomalous
// listeners. The demo generator (package demo) draws its network from it,
// and the runtime benchmarks draw their rows from it at a production-sized
// catalogue, so both describe the same fictional network.
//
// Every figure here is invented for the demo; none is a measurement of a
// real service. Tests check the generated data against one fact of the
// trade only: activity vectors are very sparse, a handful of items per user
// out of several thousand (common practice, no published source).
package listening

import (
	"math"
	"math/rand/v2"
	"slices"
)

// Model holds the listening model's parameters.
type Model struct {
	// FollowsPerSession sets how many shows a regular listener follows: one,
	// plus a Poisson number with mean FollowsPerSession × the listener's
	// sessions per week, capped at MaxFollowed shows in all.
	FollowsPerSession float64
	MaxFollowed       int
	// PopularityExponent s: the show of popularity rank k (from 1) is
	// played with probability proportional to k^-s.
	PopularityExponent float64
	// Episodes played of a followed show: exp(PlaysLogMedian +
	// PlaysLogSpread·z) times the listener's boost, rounded, at least 1 and
	// at most MaxPlays (and never more than the show has episodes).
	PlaysLogMedian, PlaysLogSpread float64
	MaxPlays                       int
	// AnomalyRate is the share of anomalous listeners (a shared device in a
	// waiting room, a client script walking the catalogue), who touch
	// AnomalyMin..AnomalyMax distinct shows, uniformly at random, with
	// 1..AnomalyMaxPlays episodes each.
	AnomalyRate            float64
	AnomalyMin, AnomalyMax int
	AnomalyMaxPlays        int
}

// Default returns the demo's listening model (invented for the demo):
// regular listeners follow 1 + Poisson(0.9 × sessions per week) shows,
// 4.6 on average at the mean of 4 sessions a week, at most 60; show
// popularity falls as rank^-1.05; a followed show gets a median of about
// 2.5 episodes played (log-normal, spread 1.0), at most 300; one listener
// in 400 is anomalous and touches 240 to 1,200 shows, 1–2 episodes each.
func Default() Model {
	return Model{
		FollowsPerSession: 0.9, MaxFollowed: 60,
		PopularityExponent: 1.05,
		PlaysLogMedian:     0.9, PlaysLogSpread: 1.0, MaxPlays: 300,
		AnomalyRate: 0.0025, AnomalyMin: 240, AnomalyMax: 1200, AnomalyMaxPlays: 2,
	}
}

// SessionsPerWeek draws a listener's listening sessions per week:
// 2 × Gamma(2, 1), mean 4.
func SessionsPerWeek(r *rand.Rand) float64 { return 2 * (r.ExpFloat64() + r.ExpFloat64()) }

// Followed draws how many shows a regular listener with the given sessions
// per week follows.
func (m Model) Followed(r *rand.Rand, sessions float64) int {
	return min(m.MaxFollowed, 1+poisson(r, m.FollowsPerSession*sessions))
}

// Plays draws the episodes a listener played of a followed show; boost
// scales the median (1 for an average listener and show) and episodes is
// how many episodes the show has (0: no limit besides MaxPlays).
func (m Model) Plays(r *rand.Rand, boost float64, episodes int) float64 {
	c := math.Round(math.Exp(m.PlaysLogMedian+m.PlaysLogSpread*r.NormFloat64()) * boost)
	hi := float64(m.MaxPlays)
	if episodes > 0 {
		hi = math.Min(hi, float64(episodes))
	}
	return math.Min(hi, math.Max(1, c))
}

// Popularity is the relative play probability of the show of popularity
// rank k (from 1).
func (m Model) Popularity(rank int) float64 {
	return math.Pow(float64(rank), -m.PopularityExponent)
}

// Anomalous draws whether a listener is anomalous.
func (m Model) Anomalous(r *rand.Rand) bool { return r.Float64() < m.AnomalyRate }

// AnomalousRow draws an anomalous listener's history over a catalogue of
// shows: distinct show indices in increasing order and episodes played of
// each.
func (m Model) AnomalousRow(r *rand.Rand, shows int) (items []int, plays []float64) {
	hi := min(m.AnomalyMax, shows)
	lo := min(m.AnomalyMin, hi)
	k := lo + r.IntN(hi-lo+1)
	items = r.Perm(shows)[:k]
	slices.Sort(items)
	plays = make([]float64, k)
	for i := range plays {
		plays[i] = float64(1 + r.IntN(m.AnomalyMaxPlays))
	}
	return items, plays
}

// Rows draws n listeners' histories over a catalogue of shows whose
// popularity rank is the show index + 1, as compressed sparse rows: row i
// holds indices[indptr[i]:indptr[i+1]] (distinct show indices) with the
// episodes played in plays. Regular listeners pick their followed shows
// by popularity; anomalous ones as AnomalousRow. It is the demo's model
// without the latent interests the demo generator adds (categories, taste):
// the same number of shows per row and the same popularity and plays.
func (m Model) Rows(r *rand.Rand, n, shows int) (indptr, indices []int32, plays []float32) {
	zipf := rand.NewZipf(r, m.PopularityExponent, 1, uint64(shows-1))
	indptr = make([]int32, 1, n+1)
	seen := map[int32]bool{}
	for range n {
		if m.Anomalous(r) {
			items, p := m.AnomalousRow(r, shows)
			for i, j := range items {
				indices = append(indices, int32(j))
				plays = append(plays, float32(p[i]))
			}
		} else {
			sessions := SessionsPerWeek(r)
			k := min(m.Followed(r, sessions), shows)
			clear(seen)
			boost := 0.6 + sessions/5
			for len(seen) < k {
				j := int32(zipf.Uint64())
				if seen[j] {
					continue
				}
				seen[j] = true
				indices = append(indices, j)
				plays = append(plays, float32(m.Plays(r, boost, 0)))
			}
		}
		indptr = append(indptr, int32(len(indices)))
	}
	return indptr, indices, plays
}

// poisson draws a Poisson number of mean lambda (Knuth's product of
// uniforms; lambda here stays below a few dozen).
func poisson(r *rand.Rand, lambda float64) int {
	if lambda <= 0 {
		return 0
	}
	limit, p, k := math.Exp(-lambda), r.Float64(), 0
	for p > limit {
		p *= r.Float64()
		k++
	}
	return k
}
