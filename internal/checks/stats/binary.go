package stats

import (
	"math"

	"github.com/modelgate/modelgate/internal/errkind"
)

const (
	// CalibrationBins is the number of equal-width calibration bins over
	// [0, 1]; a prediction p falls in bin min(floor(p·10), 9).
	CalibrationBins = 10
	// AUCBins is the resolution of Binary's score histogram: bin
	// min(floor(p·AUCBins), AUCBins−1) of [0, 1], per class.
	AUCBins = 1 << 16
	// chunk is how many rows a batch kernel sums in plain float64 before
	// folding the partial sums into the compensated totals.
	chunk = 1024
)

// Binary accumulates the holdout metrics of a scorer: weighted log loss,
// normalized entropy, AUC, calibration. Rows are (p, y, w): the predicted
// probability of the positive class in [0, 1], the label in [0, 1] (0 or 1;
// a fractional y counts as a soft label: w·y positive and w·(1−y) negative
// weight), and a weight >= 0.
//
// A Binary holds about 1 MiB (the AUC histogram). Use NewBinary; the zero
// value is not ready. A Binary is not safe for concurrent use; give each
// goroutine its own and Merge them.
type Binary struct {
	rows          int64
	w, wy, wl, wp ksum
	cal           [CalibrationBins]calSums
	hist          []float64 // 2·AUCBins: per bin positive then negative weight
}

type calSums struct{ w, wp, wy ksum }

// NewBinary returns an empty accumulator.
func NewBinary() *Binary {
	return &Binary{hist: make([]float64, 2*AUCBins)}
}

// Add adds one row; see AddBatch.
func (b *Binary) Add(p, y, w float32) error {
	ps, ys, ws := [1]float32{p}, [1]float32{y}, [1]float32{w}
	return addBinary(b, ps[:], ys[:], ws[:], nil)
}

// AddBatch adds rows (p[i], y[i], w[i]). w may be nil for unit weights.
// The batch is checked first and added only when every row is valid:
// equal lengths, p and y in [0, 1] (not NaN), w finite and >= 0; otherwise
// the error is of kind errkind.BadInput and nothing is added. AddBatch does
// not allocate.
func (b *Binary) AddBatch(p, y, w []float32) error { return addBinary(b, p, y, w, nil) }

// AddBatch64 is AddBatch for float64 inputs (for example reference values
// that float32 would round).
func (b *Binary) AddBatch64(p, y, w []float64) error { return addBinary(b, p, y, w, nil) }

// AddBatchLoss is AddBatch that also writes each row's (unweighted) log loss
// into loss[i], for a paired comparison; len(loss) must equal len(p).
func (b *Binary) AddBatchLoss(p, y, w []float32, loss []float64) error {
	if len(loss) != len(p) {
		return errkind.New(errkind.BadInput, "loss buffer of %d for %d predictions", len(loss), len(p))
	}
	return addBinary(b, p, y, w, loss)
}

// AddBatchWithLoss is AddBatch for rows whose log losses are already known:
// loss[i] must be what AddBatchLoss wrote for the same (p[i], y[i]) — for
// example when the rows of one batch are also added, by slice, to other
// accumulators. The result is bit-identical to AddBatch's, without
// recomputing the logarithms.
func (b *Binary) AddBatchWithLoss(p, y, w []float32, loss []float64) error {
	if len(loss) != len(p) {
		return errkind.New(errkind.BadInput, "loss buffer of %d for %d predictions", len(loss), len(p))
	}
	return addBinaryKnown(b, p, y, w, loss, true)
}

func addBinary[T Float](b *Binary, p, y, w []T, loss []float64) error {
	return addBinaryKnown(b, p, y, w, loss, false)
}

func addBinaryKnown[T Float](b *Binary, p, y, w []T, loss []float64, known bool) error {
	binary, err := checkRows(p, y, w, "prediction")
	if err != nil {
		return err
	}
	hist := b.hist[:2*AUCBins]
	// With labels 0 and 1 a row adds its weight to one of its bin's two
	// sums and 0 to the other (an addition that changes nothing, left
	// out). Those additions are gathered and made in a loop of their own:
	// a loop that small keeps many of its scattered loads in flight. Each
	// sum still takes its rows in order, so the result is the same, bit
	// for bit.
	var hidx [chunk]int32
	var hval [chunk]float64
	for lo := 0; lo < len(p); lo += chunk {
		hi := min(lo+chunk, len(p))
		var sw, swy, swl, swp float64
		var cal [CalibrationBins][3]float64
		// The chunk's rows as slices of one length, so that indexing them
		// by i needs no bounds check in the loop.
		pc := p[lo:hi]
		yc := y[lo:hi][:len(pc)]
		hx, hv := hidx[:len(pc)], hval[:len(pc)]
		var wc []T
		if w != nil {
			wc = w[lo:hi][:len(pc)]
		}
		var lc []float64
		if loss != nil {
			lc = loss[lo:hi][:len(pc)]
		}
		for i := range pc {
			pf, yf := float64(pc[i]), float64(yc[i])
			wf := 1.0
			if wc != nil {
				wf = float64(wc[i])
			}
			var l float64
			switch {
			case known:
				l = lc[i]
			case binary: // the same for the whole batch: not a branch on y
				l = binaryLoss(pf, yf)
			default:
				l = softLoss(pf, yf)
			}
			if lc != nil && !known {
				lc[i] = l
			}
			wy := wf * yf
			sw += wf
			swy += wy
			swl += wf * l
			swp += wf * pf
			// pf is in [0, 1] (checkRows), so the bins are in range; the
			// masks only tell the compiler so.
			c := &cal[min(uint(pf*CalibrationBins), CalibrationBins-1)]
			c[0] += wf
			c[1] += wf * pf
			c[2] += wy
			h := 2 * min(uint(pf*AUCBins), AUCBins-1)
			if binary {
				hx[i] = int32(h + 1 - uint(yf)) // the positive sum for y = 1
				hv[i] = wf
			} else {
				hist[h&(2*AUCBins-1)] += wy
				hist[(h+1)&(2*AUCBins-1)] += wf - wy
			}
		}
		if binary {
			for k, h := range hx {
				hist[uint32(h)&(2*AUCBins-1)] += hv[k]
			}
		}
		b.w.add(sw)
		b.wy.add(swy)
		b.wl.add(swl)
		b.wp.add(swp)
		for k := range cal {
			b.cal[k].w.add(cal[k][0])
			b.cal[k].wp.add(cal[k][1])
			b.cal[k].wy.add(cal[k][2])
		}
	}
	b.rows += int64(len(p))
	return nil
}

// Merge adds other's rows to b. other is unchanged.
func (b *Binary) Merge(other *Binary) {
	b.rows += other.rows
	b.w.merge(other.w)
	b.wy.merge(other.wy)
	b.wl.merge(other.wl)
	b.wp.merge(other.wp)
	for k := range b.cal {
		b.cal[k].w.merge(other.cal[k].w)
		b.cal[k].wp.merge(other.cal[k].wp)
		b.cal[k].wy.merge(other.cal[k].wy)
	}
	for i, v := range other.hist {
		b.hist[i] += v
	}
}

// Rows returns the number of rows added (whatever their weight).
func (b *Binary) Rows() int64 { return b.rows }

// WeightSum returns Σw.
func (b *Binary) WeightSum() float64 { return b.w.value() }

// LogLoss returns the weighted mean log loss Σw·loss / Σw (see Eps for the
// clipping); NaN when Σw is 0.
func (b *Binary) LogLoss() float64 { return b.wl.value() / b.w.value() }

// NormalizedEntropy returns LogLoss / H(p̄), p̄ = Σw·y / Σw the weighted
// positive rate and H the binary entropy (He et al., "Practical Lessons
// from Predicting Clicks on Ads at Facebook", ADKDD 2014): 1 for a constant
// predictor at p̄, lower is better. NaN when Σw is 0 or all the weight is in
// one class (H = 0).
func (b *Binary) NormalizedEntropy() float64 {
	h := entropy(b.wy.value() / b.w.value())
	if h == 0 {
		return math.NaN()
	}
	return b.LogLoss() / h
}

// PredictedObserved returns Σw·p / Σw·y: 1 when the predictions are
// calibrated on average, above 1 when they overpredict. +Inf when there is
// no positive weight, NaN when Σw is 0.
func (b *Binary) PredictedObserved() float64 { return b.wp.value() / b.wy.value() }

// AUC returns the area under the ROC curve (the weighted Mann–Whitney
// statistic: the probability that a positive scores above a negative, a
// tie counting ½) computed from the score histogram, and a bound on its
// error: |auc − exact| <= bound, where exact is ExactAUC over the same rows.
// Pairs in different bins are ordered exactly; a positive and a negative in
// the same bin are counted ½ each, so the bound is
// ½ · Σ_bins pos_b·neg_b / (P·N), P and N the total positive and negative
// weight (it is 0 when no bin holds both classes, and also covers exact
// ties, which ExactAUC counts ½ too). Both are NaN when P or N is 0.
func (b *Binary) AUC() (auc, bound float64) {
	var area, tie, neg, pos ksum
	h := b.hist[:2*AUCBins]
	for i := 0; i < len(h); i += 2 {
		pb, nb := h[i], h[i+1]
		area.add(pb * (neg.value() + 0.5*nb))
		tie.add(pb * nb)
		neg.add(nb)
		pos.add(pb)
	}
	pn := pos.value() * neg.value()
	if pn == 0 {
		return math.NaN(), math.NaN()
	}
	return area.value() / pn, 0.5 * tie.value() / pn
}

// Bin is one calibration bin. Its fields are those of
// checks.CalibrationBin, so a Bin converts to one with a type conversion.
type Bin struct {
	Lower     float64 // the bin is [Lower, Upper), the last one [0.9, 1]
	Upper     float64
	Count     float64 // Σw in the bin; 0 marks an empty bin
	Predicted float64 // Σw·p / Σw in the bin; 0 when empty
	Observed  float64 // Σw·y / Σw in the bin; 0 when empty
}

// Calibration returns the CalibrationBins bins of the reliability diagram,
// in order, empty ones included.
func (b *Binary) Calibration() []Bin {
	out := make([]Bin, CalibrationBins)
	for k := range out {
		c := b.cal[k]
		bin := Bin{Lower: float64(k) / CalibrationBins, Upper: float64(k+1) / CalibrationBins, Count: c.w.value()}
		if bin.Count > 0 {
			bin.Predicted = c.wp.value() / bin.Count
			bin.Observed = c.wy.value() / bin.Count
		}
		out[k] = bin
	}
	return out
}

// ECE returns the expected calibration error over the CalibrationBins
// equal-width bins (Naeini, Cooper, Hauskrecht, AAAI 2015):
// Σ_bins (W_b/W)·|mean p_b − mean y_b|, bins weighted by their share of the
// weight, empty bins skipped. NaN when Σw is 0.
func (b *Binary) ECE() float64 {
	var e ksum
	for k := range b.cal {
		e.add(math.Abs(b.cal[k].wp.value() - b.cal[k].wy.value()))
	}
	return e.value() / b.w.value()
}

// MCE returns the maximum calibration error: the largest
// |mean p_b − mean y_b| over the non-empty bins; NaN when every bin is
// empty.
func (b *Binary) MCE() float64 {
	m := math.NaN()
	for _, bin := range b.Calibration() {
		if bin.Count > 0 {
			d := math.Abs(bin.Predicted - bin.Observed)
			if !(d <= m) {
				m = d
			}
		}
	}
	return m
}
