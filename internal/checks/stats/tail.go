package stats

import (
	"math"
	"slices"

	"github.com/modelgate/modelgate/internal/errkind"
)

// TailWorst is how many rows a Tail keeps as the worst.
const TailWorst = 10

// Tail looks for confident mistakes without the labels. A mean test sees
// a candidate's catastrophic rows only when the sample holds the rare
// outcome they get wrong; but the rows themselves are in the holdout,
// whatever their label, and there the candidate's probability is extreme
// where the baseline's is not.
//
// Per row, with ℓ(p, y) the clipped log loss (see LogLoss), Tail computes
//
//	excess     = max over y in {0, 1} of ℓ(candidate, y) − ℓ(baseline, y)
//	divergence = KL(Bernoulli(baseline) ‖ Bernoulli(candidate))
//	           = b·(ℓ(c, 1) − ℓ(b, 1)) + (1 − b)·(ℓ(c, 0) − ℓ(b, 0))
//
// excess is what the candidate would lose against the baseline if the
// label were the outcome it bets against the hardest (log(b/c) or
// log((1−b)/(1−c))); divergence is the candidate's expected extra loss on
// the row were the baseline's probability right. Rows whose excess is
// above the threshold are flagged; their exposure is Σ w·divergence over
// flagged rows divided by Σ w over all rows: how much the flagged rows
// alone would add to the mean difference if the baseline were right on
// them. It is label-free, so it is there whether or not the sample
// happens to hold the rare positives.
//
// Tail is mergeable like the other accumulators; its worst rows are the
// TailWorst rows of largest excess (ties: smaller row id first), the same
// after any sharding.
type Tail struct {
	threshold         float64
	rows, flagged     int64
	w, flaggedW, expo ksum
	worst             []TailRow
}

// TailRow is one row as Tail reports it.
type TailRow struct {
	RowID      int64   `json:"rowId"`
	Candidate  float64 `json:"candidate"` // predicted probability
	Baseline   float64 `json:"baseline"`
	Label      float64 `json:"label"`  // 0 or 1, −1 when the holdout has no labels
	Excess     float64 `json:"excess"` // nats
	Divergence float64 `json:"divergence"`
}

// TailSummary is what a Tail found.
type TailSummary struct {
	Threshold float64   `json:"threshold"` // nats
	Rows      int64     `json:"rows"`
	Flagged   int64     `json:"flagged"` // rows with excess > Threshold
	Exposure  float64   `json:"exposure"`
	Worst     []TailRow `json:"worst"`
}

// NewTail returns an empty accumulator flagging rows whose excess is above
// threshold nats (finite, >= 0; error of kind errkind.BadInput otherwise).
func NewTail(threshold float64) (*Tail, error) {
	if !(threshold >= 0) || math.IsInf(threshold, 0) {
		return nil, errkind.New(errkind.BadInput, "tail threshold %v is not a finite number >= 0", threshold)
	}
	return &Tail{threshold: threshold}, nil
}

// Threshold returns the flagging threshold in nats.
func (t *Tail) Threshold() float64 { return t.threshold }

// AddBatch adds rows: ids, the candidate's and the baseline's predicted
// probabilities, labels (nil when the holdout has none) and weights (nil:
// unit). The batch is checked first (equal lengths; probabilities and
// labels in [0, 1]; weights finite and >= 0) and added only when valid;
// errors are of kind errkind.BadInput.
func (t *Tail) AddBatch(ids []int64, pc, pb, y, w []float32) error {
	n := len(pc)
	if len(ids) != n || len(pb) != n || (y != nil && len(y) != n) || (w != nil && len(w) != n) {
		return errkind.New(errkind.BadInput, "%d row ids, %d and %d predictions, %d labels, %d weights", len(ids), n, len(pb), len(y), len(w))
	}
	for i := range pc {
		if !(pc[i] >= 0 && pc[i] <= 1 && pb[i] >= 0 && pb[i] <= 1) {
			return errkind.New(errkind.BadInput, "row %d: prediction outside [0, 1]", i)
		}
		if y != nil && !(y[i] >= 0 && y[i] <= 1) {
			return errkind.New(errkind.BadInput, "row %d: label %v outside [0, 1]", i, y[i])
		}
	}
	if err := checkWeights(w); err != nil {
		return err
	}
	for lo := 0; lo < n; lo += chunk {
		hi := min(lo+chunk, n)
		var sw, sfw, sexpo float64
		for i := lo; i < hi; i++ {
			wi := weightAt(w, i)
			sw += wi
			e, kl := TailExcess(float64(pc[i]), float64(pb[i]))
			if e > t.threshold {
				t.flagged++
				sfw += wi
				sexpo += wi * kl
			}
			if last := len(t.worst) - 1; last < TailWorst-1 || e > t.worst[last].Excess ||
				(e == t.worst[last].Excess && ids[i] < t.worst[last].RowID) {
				label := -1.0
				if y != nil {
					label = float64(y[i])
				}
				t.keep(TailRow{RowID: ids[i], Candidate: float64(pc[i]), Baseline: float64(pb[i]), Label: label, Excess: e, Divergence: kl})
			}
		}
		t.w.add(sw)
		t.flaggedW.add(sfw)
		t.expo.add(sexpo)
	}
	t.rows += int64(n)
	return nil
}

// TailExcess returns a row's excess and divergence (see Tail) for the
// candidate's probability c and the baseline's b.
func TailExcess(c, b float64) (excess, divergence float64) {
	d1 := LogLoss(c, 1) - LogLoss(b, 1)
	d0 := LogLoss(c, 0) - LogLoss(b, 0)
	bc := Clip(b)
	kl := bc*d1 + (1-bc)*d0
	if kl < 0 { // rounding: the divergence is >= 0
		kl = 0
	}
	return max(d1, d0), kl
}

// worse orders rows by excess, larger first, then by row id.
func worse(a, b TailRow) int {
	switch {
	case a.Excess > b.Excess:
		return -1
	case a.Excess < b.Excess:
		return 1
	case a.RowID < b.RowID:
		return -1
	case a.RowID > b.RowID:
		return 1
	}
	return 0
}

// keep inserts r among the worst rows, keeping TailWorst of them.
func (t *Tail) keep(r TailRow) {
	i, _ := slices.BinarySearchFunc(t.worst, r, worse)
	if i >= TailWorst {
		return
	}
	t.worst = slices.Insert(t.worst, i, r)
	if len(t.worst) > TailWorst {
		t.worst = t.worst[:TailWorst]
	}
}

// Merge adds other's rows to t; both must have the same threshold (error
// of kind errkind.BadInput otherwise, t unchanged).
func (t *Tail) Merge(other *Tail) error {
	if t.threshold != other.threshold {
		return errkind.New(errkind.BadInput, "merging tail statistics with threshold %v into threshold %v", other.threshold, t.threshold)
	}
	t.rows += other.rows
	t.flagged += other.flagged
	t.w.merge(other.w)
	t.flaggedW.merge(other.flaggedW)
	t.expo.merge(other.expo)
	for _, r := range other.worst {
		t.keep(r)
	}
	return nil
}

// Summary returns what t found; Exposure is 0 when no row has weight.
func (t *Tail) Summary() TailSummary {
	s := TailSummary{Threshold: t.threshold, Rows: t.rows, Flagged: t.flagged, Worst: slices.Clone(t.worst)}
	if w := t.w.value(); w > 0 {
		s.Exposure = t.expo.value() / w
	}
	return s
}

// MarshalBinary encodes the accumulator (kind 'T'): threshold, rows,
// flagged rows, Σw, flagged Σw, Σw·divergence, then the worst rows (a
// uint32 count; per row its id and five float64).
func (t *Tail) MarshalBinary() ([]byte, error) {
	e := newEncoder('T', 8*3+16*3+4+48*len(t.worst))
	e.f64(t.threshold)
	e.u64(uint64(t.rows))
	e.u64(uint64(t.flagged))
	for _, k := range []ksum{t.w, t.flaggedW, t.expo} {
		e.sum(k)
	}
	e.u32(uint32(len(t.worst)))
	for _, r := range t.worst {
		e.u64(uint64(r.RowID))
		for _, v := range []float64{r.Candidate, r.Baseline, r.Label, r.Excess, r.Divergence} {
			e.f64(v)
		}
	}
	return e.b, nil
}

// UnmarshalBinary replaces t with the decoded accumulator; the zero Tail
// may be the receiver.
func (t *Tail) UnmarshalBinary(data []byte) error {
	d := newDecoder(data, 'T', "tail statistics")
	var v Tail
	v.threshold = d.nonneg()
	v.rows, v.flagged = d.count(), d.count()
	if d.err == nil && v.flagged > v.rows {
		d.fail("%d flagged rows of %d", v.flagged, v.rows)
	}
	v.w, v.flaggedW, v.expo = d.weightSum(), d.weightSum(), d.weightSum()
	n := d.u32()
	if d.err == nil && (n > TailWorst || int64(n) > v.rows) {
		d.fail("%d worst rows", n)
	}
	for i := uint32(0); i < n && d.err == nil; i++ {
		r := TailRow{RowID: int64(d.u64())}
		r.Candidate, r.Baseline, r.Label, r.Excess, r.Divergence = d.f64(), d.f64(), d.f64(), d.f64(), d.nonneg()
		if d.err == nil && len(v.worst) > 0 && worse(v.worst[len(v.worst)-1], r) >= 0 {
			d.fail("worst rows out of order")
		}
		v.worst = append(v.worst, r)
	}
	if err := d.end(); err != nil {
		return err
	}
	*t = v
	return nil
}
