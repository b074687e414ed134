package stats

import (
	"math"

	"github.com/modelgate/modelgate/internal/errkind"
)

// BCE returns a row's binary cross-entropy between reconstruction q and
// target t, element-wise −(t·log(q) + (1−t)·log(1−q)) with q clipped as by
// Clip: all is the mean over every output, nonzero the mean over the
// outputs whose target is not 0 (NaN when there is none; all is NaN for an
// empty row). Targets may be fractional. BCE does not validate its input
// (Recon does): q outside [0, 1] is clipped, NaN gives NaN. It panics when
// the lengths differ.
func BCE[T Float](q, t []T) (all, nonzero float64) {
	s, nz, cnt := bce(q, t)
	return s / float64(len(q)), nz / float64(cnt)
}

// bce returns the sum over all outputs, the sum over nonzero targets and
// their count.
//
// Targets are mostly zero (sparse rows), and a zero target costs
// −log(1−q): those terms are summed as −log of a product, 16 factors per
// logarithm in each of four independent lanes (each factor is at least
// about 1e-15 after clipping, so 16 of them stay above 1e-240, clear of
// underflow). That takes one logarithm per 16 outputs instead of one per
// output; the product's rounding adds at most about 16 ulp per logarithm,
// about 1e-15 relative to the row's sum. Nonzero targets are summed term by
// term.
func bce[T Float](q, t []T) (sum, nzSum float64, nz int) {
	if len(q) != len(t) {
		panic("stats.BCE: reconstruction and target lengths differ")
	}
	n := len(q)
	var logs float64 // Σ log(1−q) over zero targets
	p0, p1, p2, p3 := 1.0, 1.0, 1.0, 1.0
	j, rounds := 0, 0
	for ; j+4 <= n; j += 4 {
		f0 := 1 - Clip(float64(q[j]))
		f1 := 1 - Clip(float64(q[j+1]))
		f2 := 1 - Clip(float64(q[j+2]))
		f3 := 1 - Clip(float64(q[j+3]))
		// Nonzero targets (rare) leave the product.
		if t[j] != 0 {
			f0 = 1
			nzSum += bceTerm(float64(q[j]), float64(t[j]))
			nz++
		}
		if t[j+1] != 0 {
			f1 = 1
			nzSum += bceTerm(float64(q[j+1]), float64(t[j+1]))
			nz++
		}
		if t[j+2] != 0 {
			f2 = 1
			nzSum += bceTerm(float64(q[j+2]), float64(t[j+2]))
			nz++
		}
		if t[j+3] != 0 {
			f3 = 1
			nzSum += bceTerm(float64(q[j+3]), float64(t[j+3]))
			nz++
		}
		p0 *= f0
		p1 *= f1
		p2 *= f2
		p3 *= f3
		if rounds++; rounds == 16 {
			logs += math.Log(p0) + math.Log(p1) + math.Log(p2) + math.Log(p3)
			p0, p1, p2, p3, rounds = 1, 1, 1, 1, 0
		}
	}
	logs += math.Log(p0) + math.Log(p1) + math.Log(p2) + math.Log(p3)
	for ; j < n; j++ {
		if tj := float64(t[j]); tj != 0 {
			e := bceTerm(float64(q[j]), tj)
			nzSum += e
			nz++
		} else {
			logs += math.Log(1 - Clip(float64(q[j])))
		}
	}
	return nzSum - logs, nzSum, nz
}

// bceTerm is one output's binary cross-entropy, q clipped.
func bceTerm(q, t float64) float64 {
	qc := Clip(q)
	return -(t*math.Log(qc) + (1-t)*math.Log(1-qc))
}

// WeightFunc gives a row's weight from the number of nonzero targets in it
// (for example to damp rows far above a training quantile of nonzeros). It
// must return a finite number >= 0.
type WeightFunc func(nonzeros int) float64

// Recon accumulates an encoder's reconstruction losses over rows. For a row
// with all = mean BCE over every output, nz = mean BCE over its nonzero
// targets (the observed entries) and weight w = weight(number of nonzero
// targets):
//
//   - BCEAll is Σw·all / Σw over every row;
//   - BCENonzero is Σw·nz / Σw over the rows with a nonzero target;
//   - Reconstruction is Σw·c / Σw over every row, with the row's combined
//     loss c = alpha·nz + (1−alpha)·all, or c = all for a row without a
//     nonzero target (nz is undefined there).
//
// The combined loss weighs observed entries against unobserved ones as
// confidence weighting does in implicit feedback (Hu, Koren, Volinsky,
// "Collaborative Filtering for Implicit Feedback Datasets", ICDM 2008): in a
// row of n outputs with m observed, an observed entry weighs alpha/m +
// (1−alpha)/n and an unobserved one (1−alpha)/n. alpha = 1 is the loss over
// observed entries only (Sedhain, Menon, Sanner, Xie, "AutoRec: Autoencoders
// Meet Collaborative Filtering", WWW 2015); alpha = 0 the plain mean over
// every output.
//
// Use NewRecon. A Recon is not safe for concurrent use.
type Recon struct {
	alpha           float64
	weight          WeightFunc
	rows, rowsNZ    int64
	w, wAll, wNZ    ksum
	wNZLoss, wCombo ksum
	scratch         []rowSums // AddBatch's per-row results, reused
}

// NewRecon returns an empty accumulator. alpha in [0, 1] weighs the
// nonzero-target term; weight may be nil for unit weights. Errors (kind
// errkind.BadInput): alpha outside [0, 1].
func NewRecon(alpha float64, weight WeightFunc) (*Recon, error) {
	if !(alpha >= 0 && alpha <= 1) {
		return nil, errkind.New(errkind.BadInput, "reconstruction alpha %v outside [0, 1]", alpha)
	}
	return &Recon{alpha: alpha, weight: weight}, nil
}

// Alpha returns the weight of the nonzero-target term.
func (r *Recon) Alpha() float64 { return r.alpha }

// AddRow adds one row and returns its combined loss c (see Recon), for a
// paired comparison. Errors (kind errkind.BadInput, nothing added): unequal
// lengths, an empty row, q or t outside [0, 1] or NaN, a weight that is
// negative or not finite.
func (r *Recon) AddRow(q, t []float32) (float64, error) {
	if err := checkRecon(q, t); err != nil {
		return 0, err
	}
	sum, nzSum, nz := bce(q, t)
	w, err := r.rowWeight(nz)
	if err != nil {
		return 0, err
	}
	return r.add(sum, nzSum, nz, len(q), w), nil
}

// AddBatch adds rows of width outputs each, stored one after another in q
// and t (len(q) = len(t) = rows·width), and writes each row's combined loss
// into loss[i] when loss is not nil (then len(loss) must be the number of
// rows). The batch is added only when every row is valid (see AddRow); the
// error names the row. AddBatch keeps per-row results in a scratch slice it
// reuses, so it allocates only for a batch with more rows than any before.
func (r *Recon) AddBatch(q, t []float32, width int, loss []float64) error {
	if width < 1 || len(q)%width != 0 {
		return errkind.New(errkind.BadInput, "%d outputs do not make rows of width %d", len(q), width)
	}
	rows := len(q) / width
	if loss != nil && len(loss) != rows {
		return errkind.New(errkind.BadInput, "loss buffer of %d for %d rows", len(loss), rows)
	}
	if len(t) != len(q) {
		return errkind.New(errkind.BadInput, "%d reconstructions for %d targets", len(q), len(t))
	}
	// Check and compute row by row while the row is in cache; add only
	// when every row is valid.
	if cap(r.scratch) < rows {
		r.scratch = make([]rowSums, 0, rows)
	}
	sums := r.scratch[:0]
	for i := range rows {
		qi, ti := q[i*width:(i+1)*width], t[i*width:(i+1)*width]
		if err := checkRecon(qi, ti); err != nil {
			return errkind.New(errkind.BadInput, "row %d: %w", i, err)
		}
		sum, nzSum, nz := bce(qi, ti)
		w, err := r.rowWeight(nz)
		if err != nil {
			return errkind.New(errkind.BadInput, "row %d: %w", i, err)
		}
		sums = append(sums, rowSums{sum, nzSum, nz, w})
	}
	r.scratch = sums
	for i, s := range sums {
		c := r.add(s.sum, s.nzSum, s.nz, width, s.w)
		if loss != nil {
			loss[i] = c
		}
	}
	return nil
}

type rowSums struct {
	sum, nzSum float64
	nz         int
	w          float64
}

func checkRecon(q, t []float32) error {
	if len(q) != len(t) {
		return errkind.New(errkind.BadInput, "%d reconstructions for %d targets", len(q), len(t))
	}
	if len(q) == 0 {
		return errkind.New(errkind.BadInput, "empty reconstruction row")
	}
	// Fast path without a branch per value: the largest bit pattern of a
	// float32 in [+0, 1] is that of 1; anything negative (−0 included),
	// above 1 or NaN has a larger one and sends us to the exact check.
	var m uint32
	for j := range q {
		m = max(m, math.Float32bits(q[j]), math.Float32bits(t[j]))
	}
	if m <= one32 {
		return nil
	}
	for j := range q {
		if !(q[j] >= 0 && q[j] <= 1) {
			return errkind.New(errkind.BadInput, "output %d: reconstruction %v outside [0, 1]", j, q[j])
		}
		if !(t[j] >= 0 && t[j] <= 1) {
			return errkind.New(errkind.BadInput, "output %d: target %v outside [0, 1]", j, t[j])
		}
	}
	return nil
}

// one32 is the bit pattern of float32 1.
const one32 = 0x3f800000

func (r *Recon) rowWeight(nz int) (float64, error) {
	if r.weight == nil {
		return 1, nil
	}
	w := r.weight(nz)
	if !(w >= 0 && w <= math.MaxFloat64) {
		return 0, errkind.New(errkind.BadInput, "weight %v for %d nonzero targets is not a finite number >= 0", w, nz)
	}
	return w, nil
}

func (r *Recon) add(sum, nzSum float64, nz, width int, w float64) float64 {
	all := sum / float64(width)
	c := all
	r.rows++
	r.w.add(w)
	r.wAll.add(w * all)
	if nz > 0 {
		nzMean := nzSum / float64(nz)
		c = r.alpha*nzMean + (1-r.alpha)*all
		r.rowsNZ++
		r.wNZ.add(w)
		r.wNZLoss.add(w * nzMean)
	}
	r.wCombo.add(w * c)
	return c
}

// Merge adds other's rows to r. Both must have the same alpha (error of
// kind errkind.BadInput otherwise, r unchanged); the caller must have used
// the same weight function. other is unchanged.
func (r *Recon) Merge(other *Recon) error {
	if r.alpha != other.alpha {
		return errkind.New(errkind.BadInput, "merging reconstruction losses with alpha %v into alpha %v", other.alpha, r.alpha)
	}
	r.rows += other.rows
	r.rowsNZ += other.rowsNZ
	r.w.merge(other.w)
	r.wAll.merge(other.wAll)
	r.wNZ.merge(other.wNZ)
	r.wNZLoss.merge(other.wNZLoss)
	r.wCombo.merge(other.wCombo)
	return nil
}

// Rows returns the number of rows added.
func (r *Recon) Rows() int64 { return r.rows }

// WeightSum returns Σw over every row.
func (r *Recon) WeightSum() float64 { return r.w.value() }

// BCEAll returns the weighted mean over rows of the plain BCE; NaN when Σw
// is 0.
func (r *Recon) BCEAll() float64 { return r.wAll.value() / r.w.value() }

// BCENonzero returns the weighted mean over rows with a nonzero target of
// their BCE over nonzero targets; NaN when there is no such row with
// weight.
func (r *Recon) BCENonzero() float64 { return r.wNZLoss.value() / r.wNZ.value() }

// Reconstruction returns the weighted mean combined loss (see Recon); NaN
// when Σw is 0.
func (r *Recon) Reconstruction() float64 { return r.wCombo.value() / r.w.value() }
