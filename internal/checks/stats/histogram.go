package stats

import (
	"math"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Histogram is a weighted histogram with equal-width bins over [Min, Max]:
// bin i holds [Min + i·width, Min + (i+1)·width), the last one also Max.
// Values below Min are summed in Under, values above Max in Over. Sums are
// plain float64 (exact for integer weights below 2^53). Merging two
// histograms with the same Min, Max and bin count adds them bin by bin.
// Its Min, Max and Counts are those of checks.Histogram.
type Histogram struct {
	Min, Max    float64
	Counts      []float64 // Σw per bin
	Under, Over float64   // Σw below Min, above Max
}

// NewHistogram returns an empty histogram of bins bins over [lo, hi].
// Errors (kind errkind.BadInput): lo or hi not finite, lo >= hi, bins < 1.
func NewHistogram(lo, hi float64, bins int) (*Histogram, error) {
	if math.IsNaN(lo) || math.IsNaN(hi) || math.IsInf(lo, 0) || math.IsInf(hi, 0) || !(lo < hi) {
		return nil, errkind.New(errkind.BadInput, "histogram range [%v, %v] is not a finite non-empty interval", lo, hi)
	}
	if bins < 1 || bins > 1<<24 {
		return nil, errkind.New(errkind.BadInput, "histogram of %d bins", bins)
	}
	return &Histogram{Min: lo, Max: hi, Counts: make([]float64, bins)}, nil
}

// Add adds x with weight w. Errors (kind errkind.BadInput, nothing added):
// x NaN, w negative or not finite. ±Inf go to Under and Over.
func (h *Histogram) Add(x, w float64) error {
	xs, ws := [1]float64{x}, [1]float64{w}
	return addHist(h, xs[:], ws[:])
}

// AddBatch adds x[i] with weight w[i]; w may be nil for unit weights. The
// batch is added only when every row is valid (see Add).
func (h *Histogram) AddBatch(x []float64, w []float32) error { return addHist(h, x, w) }

func addHist[T Float](h *Histogram, x []float64, w []T) error {
	if w != nil && len(w) != len(x) {
		return errkind.New(errkind.BadInput, "%d weights for %d values", len(w), len(x))
	}
	for i, v := range x {
		if math.IsNaN(v) {
			return errkind.New(errkind.BadInput, "row %d: value is NaN", i)
		}
	}
	if err := checkWeights(w); err != nil {
		return err
	}
	n := len(h.Counts)
	scale := float64(n) / (h.Max - h.Min)
	for i, v := range x {
		wi := 1.0
		if w != nil {
			wi = float64(w[i])
		}
		switch {
		case v < h.Min:
			h.Under += wi
		case v > h.Max:
			h.Over += wi
		default:
			h.Counts[min(int((v-h.Min)*scale), n-1)] += wi
		}
	}
	return nil
}

// Merge adds other's counts to h. Errors (kind errkind.BadInput, h
// unchanged) when the two differ in Min, Max or bin count.
func (h *Histogram) Merge(other *Histogram) error {
	if h.Min != other.Min || h.Max != other.Max || len(h.Counts) != len(other.Counts) {
		return errkind.New(errkind.BadInput, "merging a histogram of %d bins over [%v, %v] into one of %d bins over [%v, %v]",
			len(other.Counts), other.Min, other.Max, len(h.Counts), h.Min, h.Max)
	}
	for i, c := range other.Counts {
		h.Counts[i] += c
	}
	h.Under += other.Under
	h.Over += other.Over
	return nil
}

// Total returns the weight of every value added, Under and Over included.
func (h *Histogram) Total() float64 {
	t := h.Under + h.Over
	for _, c := range h.Counts {
		t += c
	}
	return t
}
