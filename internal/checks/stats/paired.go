package stats

import (
	"math"
	"math/bits"
	"runtime"
	"slices"
	"sync"

	"gonum.org/v1/gonum/stat/distuv"

	"github.com/modelgate/modelgate/internal/errkind"
)

// DefaultReplicates is the number of Poisson-bootstrap replicates the gate
// uses unless its policy says otherwise.
const DefaultReplicates = 200

// MaxReplicates bounds NewPaired's replicates (memory is 48 bytes per
// replicate).
const MaxReplicates = 1 << 20

// Paired accumulates per-row differences d = loss(candidate) −
// loss(baseline), each with a weight w >= 0, for the non-inferiority test of
// the candidate against the baseline.
//
// It keeps Σw, Σw², Σw·d and M2 = Σw·(d − mean)² (per chunk of rows two-pass,
// chunks and shards combined with Chan, Golub and LeVeque's parallel
// update), and for each bootstrap replicate r the sums Σw·k and Σw·k·d,
// where k ~ Poisson(1) is a pure function of (seed, row id, r). So shards
// that each add their rows and are merged give the same draws as one
// accumulator fed every row, whatever the shard boundaries and row order;
// with unit weights the Σw·k sums are small integers and come out
// bit-identical.
//
// Weights are reliability (importance) weights, not frequencies: the test
// is unchanged when every weight is multiplied by the same factor. With
// unit weights it is exactly the one-sample t test on d (scipy's
// ttest_rel / ttest_1samp).
//
// Each row id must be added once across all shards: a repeated id gets
// the same bootstrap draws again. A Paired is not safe for concurrent use.
type Paired struct {
	seed, seedMix uint64
	reps          int
	rows          int64
	w, w2, wd, m2 ksum
	m3            ksum // Σw·(d − mean)³
	// clusters, when not nil, holds each cluster's Σw·d and Σw (see
	// NewClusteredPaired).
	clusters map[uint64]*clusterSum
	rep      []ksum    // 2 per replicate: Σw·k, Σw·k·d
	acc      []float64 // chunk-local replicate sums, same layout
	keys     []uint64  // chunk scratch: row keys,
	wv, wdv  []float64 // weights and weight·difference
}

// NewPaired returns an empty accumulator whose bootstrap has the given
// seed and number of replicates (0 for none, at most MaxReplicates).
func NewPaired(seed uint64, replicates int) (*Paired, error) {
	if replicates < 0 || replicates > MaxReplicates {
		return nil, errkind.New(errkind.BadInput, "bootstrap replicates %d outside [0, %d]", replicates, MaxReplicates)
	}
	return &Paired{
		seed: seed, seedMix: mix64(seed), reps: replicates,
		rep: make([]ksum, 2*replicates), acc: make([]float64, 2*replicates),
		keys: make([]uint64, chunk), wv: make([]float64, chunk), wdv: make([]float64, chunk),
	}, nil
}

// Seed returns the bootstrap seed.
func (a *Paired) Seed() uint64 { return a.seed }

// Replicates returns the number of bootstrap replicates.
func (a *Paired) Replicates() int { return a.reps }

// NewClusteredPaired returns an empty accumulator for rows grouped in
// clusters (for example a listener's rows): rows are added with
// AddBatchClustered, the test's standard error is cluster-robust and the
// bootstrap resamples whole clusters; see Clusters.
func NewClusteredPaired(seed uint64, replicates int) (*Paired, error) {
	a, err := NewPaired(seed, replicates)
	if err != nil {
		return nil, err
	}
	a.clusters = map[uint64]*clusterSum{}
	return a, nil
}

// Clustered reports whether a was made by NewClusteredPaired.
func (a *Paired) Clustered() bool { return a.clusters != nil }

// Add adds one row; see AddBatch.
func (a *Paired) Add(id int64, d float64, w float32) error {
	is, ds, ws := [1]int64{id}, [1]float64{d}, [1]float32{w}
	return a.AddBatch(is[:], ds[:], ws[:])
}

// AddBatch adds rows (ids[i], d[i], w[i]); w may be nil for unit weights.
// The batch is checked first and added only when valid: equal lengths, d
// finite, w finite and >= 0; otherwise the error is of kind
// errkind.BadInput and nothing is added. AddBatch does not allocate. Its
// cost is dominated by the bootstrap: Replicates() draws per row.
func (a *Paired) AddBatch(ids []int64, d []float64, w []float32) error {
	if a.clusters != nil {
		return errkind.New(errkind.BadInput, "rows of a clustered comparison need their cluster keys")
	}
	return a.addBatch(ids, nil, d, w)
}

// AddBatchClustered adds rows (d[i], w[i]) of cluster clusters[i] to an
// accumulator made by NewClusteredPaired; w may be nil for unit weights.
// A cluster's rows may come in any number of batches, shards and orders.
// Each row's bootstrap draw is its cluster's, a pure function of (seed,
// cluster key, replicate), so every replicate takes or leaves a whole
// cluster, in every shard alike. Checks and errors as AddBatch; ids are
// checked for length only.
func (a *Paired) AddBatchClustered(ids []int64, clusters []uint64, d []float64, w []float32) error {
	if a.clusters == nil {
		return errkind.New(errkind.BadInput, "cluster keys given to an unclustered comparison")
	}
	if len(clusters) != len(d) {
		return errkind.New(errkind.BadInput, "%d cluster keys, %d differences", len(clusters), len(d))
	}
	return a.addBatch(ids, clusters, d, w)
}

func (a *Paired) addBatch(ids []int64, clusters []uint64, d []float64, w []float32) error {
	if len(ids) != len(d) || (w != nil && len(w) != len(d)) {
		return errkind.New(errkind.BadInput, "%d row ids, %d differences, %d weights", len(ids), len(d), len(w))
	}
	for i, x := range d {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return errkind.New(errkind.BadInput, "row %d: loss difference %v is not finite", i, x)
		}
	}
	if err := checkWeights(w); err != nil {
		return err
	}
	for lo := 0; lo < len(d); lo += chunk {
		hi := min(lo+chunk, len(d))
		var cl []uint64
		if clusters != nil {
			cl = clusters[lo:hi]
		}
		a.addChunk(ids[lo:hi], cl, d[lo:hi], weightsOrNil(w, lo, hi))
	}
	a.rows += int64(len(d))
	return nil
}

func weightsOrNil(w []float32, lo, hi int) []float32 {
	if w == nil {
		return nil
	}
	return w[lo:hi]
}

func weightAt(w []float32, i int) float64 {
	if w == nil {
		return 1
	}
	return float64(w[i])
}

// addChunk adds at most chunk valid rows; clusters is nil for
// unclustered rows.
func (a *Paired) addChunk(ids []int64, clusters []uint64, d []float64, w []float32) {
	var sw, sw2, swd float64
	for i, x := range d {
		wi := weightAt(w, i)
		sw += wi
		sw2 += wi * wi
		swd += wi * x
	}
	if sw == 0 {
		return // zero-weight rows change nothing
	}
	mean := swd / sw
	var m2, m3 float64
	for i, x := range d {
		e := x - mean
		we2 := weightAt(w, i) * e * e
		m2 += we2
		m3 += we2 * e
	}
	a.mergeMoments(ksum{s: sw}, ksum{s: sw2}, ksum{s: swd}, ksum{s: m2}, ksum{s: m3})
	for i, c := range clusters {
		a.clusterAdd(c, weightAt(w, i)*d[i], weightAt(w, i))
	}

	reps := a.reps
	if reps == 0 {
		return
	}
	// Replicates outer, rows inner: the four running sums of a replicate
	// pair stay in registers while the chunk's rows stream from L1.
	keys, wv, wdv := a.keys[:len(d)], a.wv[:len(d)], a.wdv[:len(d)]
	for i, x := range d {
		wi := weightAt(w, i)
		if clusters != nil {
			keys[i] = rowKey(a.seedMix, int64(clusters[i]))
		} else {
			keys[i] = rowKey(a.seedMix, ids[i])
		}
		wv[i] = wi
		wdv[i] = wi * x
	}
	acc := a.acc[:2*reps]
	replicateSums(keys, wv, wdv, acc, reps)
	rep := a.rep[:2*reps]
	for j, v := range acc {
		rep[j].add(v)
	}
}

// mergeMoments folds a group's Σw, Σw², Σw·d, M2 and M3 into a (the
// pairwise updates of Chan, Golub and LeVeque and, for M3, Pébay 2008,
// "Formulas for robust, one-pass parallel computation of covariances and
// arbitrary-order statistical moments", eq. 2.1).
func (a *Paired) mergeMoments(w, w2, wd, m2, m3 ksum) {
	wb := w.value()
	if wb == 0 {
		return
	}
	if wa := a.w.value(); wa > 0 {
		delta := wd.value()/wb - a.wd.value()/wa
		n := wa + wb
		a.m3.add(delta * delta * delta * wa * wb * (wa - wb) / (n * n))
		a.m3.add(3 * delta * (wa*m2.value() - wb*a.m2.value()) / n)
		a.m2.add(delta * delta * (wa * wb / n))
	}
	a.m3.merge(m3)
	a.m2.merge(m2)
	a.w.merge(w)
	a.w2.merge(w2)
	a.wd.merge(wd)
}

// Merge adds other's rows to a. Both must have the same seed and number of
// replicates (error of kind errkind.BadInput otherwise, a unchanged).
// other is unchanged.
func (a *Paired) Merge(other *Paired) error {
	if a.seed != other.seed || a.reps != other.reps {
		return errkind.New(errkind.BadInput, "merging bootstraps with seed %d, %d replicates into seed %d, %d replicates",
			other.seed, other.reps, a.seed, a.reps)
	}
	if a.Clustered() != other.Clustered() {
		return errkind.New(errkind.BadInput, "merging clustered and unclustered comparisons")
	}
	a.mergeMoments(other.w, other.w2, other.wd, other.m2, other.m3)
	for k, c := range other.clusters {
		a.clusterAdd(k, c.wd, c.w)
	}
	for j := range a.rep {
		a.rep[j].merge(other.rep[j])
	}
	a.rows += other.rows
	return nil
}

// Rows returns the number of rows added (whatever their weight).
func (a *Paired) Rows() int64 { return a.rows }

// WeightSum returns Σw.
func (a *Paired) WeightSum() float64 { return a.w.value() }

// Mean returns the weighted mean difference Σw·d / Σw; NaN when Σw is 0.
func (a *Paired) Mean() float64 { return a.wd.value() / a.w.value() }

// EffectiveN returns Kish's effective sample size (Σw)² / Σw²: the number
// of rows with unit weights, 0 when Σw is 0.
func (a *Paired) EffectiveN() float64 {
	w, w2 := a.w.value(), a.w2.value()
	if w2 == 0 {
		return 0
	}
	return w * w / w2
}

// StdErr returns the standard error of Mean. Unclustered: sqrt(s² /
// EffectiveN) with s² = M2 / (Σw − Σw²/Σw) the unbiased variance for
// reliability weights (with unit weights M2/(n−1), the sample variance);
// NaN when EffectiveN is at most 1. Clustered: the cluster-robust (CR1)
// standard error, see Clusters.
func (a *Paired) StdErr() float64 {
	se, _, _, _ := a.spread()
	return se
}

// Clusters returns the number of clusters with weight (0 when a is
// unclustered).
//
// For a clustered accumulator the test's variance is the cluster-robust
// sandwich of the weighted mean, CR1: with A_g = Σw·d and W_g = Σw over
// cluster g, G clusters and mean m = ΣA_g/ΣW_g,
//
//	Var(m) = G/(G−1) · Σ_g (A_g − m·W_g)² / (Σ_g W_g)²
//
// and the t statistic has G − 1 degrees of freedom (Cameron and Miller
// 2015, "A Practitioner's Guide to Cluster-Robust Inference", Journal of
// Human Resources 50(2), sections II.C and VI: the CR1 small-sample
// factor c = G/(G−1)·(N−1)/(N−K), with K = 1 regressor, the intercept,
// and T(G−1) critical values). With one row per cluster and unit weights
// it is the ordinary s²/n.
func (a *Paired) Clusters() int64 {
	if a.clusters == nil {
		return 0
	}
	var g int64
	for _, c := range a.clusters {
		if c.w > 0 {
			g++
		}
	}
	return g
}

// spread returns the standard error of Mean, the test's degrees of
// freedom, the skewness of the terms whose mean the test studies (rows,
// or cluster totals) and their count n. All NaN when n is at most 1.
func (a *Paired) spread() (se, df, skew, n float64) {
	nan := math.NaN()
	w := a.w.value()
	if a.clusters == nil {
		n = a.EffectiveN()
		if !(n > 1) {
			return nan, nan, nan, nan
		}
		m2, w2 := a.m2.value(), a.w2.value()
		s2 := m2 / (w - w2/w)
		if m2 > 0 {
			skew = (a.m3.value() / w) / math.Pow(m2/w, 1.5)
		}
		return math.Sqrt(s2 / n), n - 1, skew, n
	}
	keys := make([]uint64, 0, len(a.clusters))
	for k, c := range a.clusters {
		if c.w > 0 {
			keys = append(keys, k)
		}
	}
	g := float64(len(keys))
	if !(g > 1) {
		return nan, nan, nan, nan
	}
	slices.Sort(keys) // a fixed summation order: map order is random
	m := a.Mean()
	var s2, s3 float64
	for _, k := range keys {
		c := a.clusters[k]
		u := c.wd - m*c.w
		s2 += u * u
		s3 += u * u * u
	}
	if s2 > 0 {
		skew = (s3 / g) / math.Pow(s2/g, 1.5)
	}
	return math.Sqrt(g/(g-1)*s2) / w, g - 1, skew, g
}

// TTest returns the two-sided one-sample t test of H0: mean(d) = 0 — with
// unit weights the paired t test of candidate against baseline, as scipy's
// ttest_rel(candidate, baseline): t = Mean/StdErr, df = EffectiveN − 1
// (clustered: Clusters − 1) and p = P(|T_df| >= |t|). When StdErr is 0, t
// is ±Inf (p 0), or 0 (p 1) when the mean is 0 too. All NaN when
// EffectiveN (clustered: Clusters) is at most 1.
func (a *Paired) TTest() (t, df, p float64) {
	se, df, _, _ := a.spread()
	if math.IsNaN(se) {
		return math.NaN(), math.NaN(), math.NaN()
	}
	t = ratio(a.Mean(), se)
	return t, df, 2 * studentsT(df).CDF(-math.Abs(t))
}

// ratio is x/se with 0/0 taken as 0.
func ratio(x, se float64) float64 {
	if se == 0 && x == 0 {
		return 0
	}
	return x / se
}

func studentsT(df float64) distuv.StudentsT {
	return distuv.StudentsT{Mu: 0, Sigma: 1, Nu: df}
}

// tQuantile returns the p-quantile of Student's t with df degrees of
// freedom (gonum's).
//
// Accuracy of gonum's t distribution (CDF and quantile), measured against
// mpmath at 40 digits: about 1e-15 relative up to df 100, then roughly
// 2e-16·df·ln(df) (3e-13 at df 1,000, 1e-10 at df 100,000), from the
// log-beta prefactor of its incomplete beta function. The error is not
// smooth in df, so two runs whose weighted df differ in the last bit can
// give p-values and bounds that differ by that much. Far below what a gate
// decision can notice; sums and the t statistic are not affected.
func tQuantile(p, df float64) float64 { return studentsT(df).Quantile(p) }

// Test is the result of the non-inferiority test. Its fields are those of
// checks.NonInferiority, so a Test converts to one with a type conversion.
type Test struct {
	Margin     float64
	Confidence float64
	N          int64   // rows added (whatever their weight)
	Clusters   int64   // clusters with weight; 0 when rows are not clustered
	MeanDiff   float64 // weighted mean of d
	StdErr     float64 // cluster-robust when Clusters > 0
	T          float64 // (MeanDiff − Margin) / StdErr
	DF         float64 // EffectiveN − 1, or Clusters − 1
	P          float64 // one-sided p-value of H0: mean(d) >= Margin
	Upper      float64 // upper one-sided Confidence bound of mean(d) (t)
	// Skewness is the sample skewness of the rows' differences (of the
	// clusters' totals when clustered); MinRows = 25·max(Skewness, 0)² is
	// the size the t bound needs (see NonInferiority), in rows (clusters
	// when clustered), to be compared with DF + 1.
	Skewness float64
	MinRows  float64
	// BootstrapLower and BootstrapUpper are the (1−Confidence) and
	// Confidence quantiles (numpy's default, type 7) of the replicate means
	// Σw·k·d / Σw·k; BootstrapReplicas counts the replicates used (those
	// with Σw·k > 0). Both bounds are 0 when it is 0.
	BootstrapLower    float64
	BootstrapUpper    float64
	BootstrapReplicas int
	Pass              bool // Upper < Margin and DF + 1 > MinRows (rows or clusters)
}

// NonInferiority tests H0: mean(d) >= margin against H1: mean(d) < margin
// (the candidate loses less than margin) with the one-sided t test: t =
// (Mean − margin)/StdErr, df = EffectiveN − 1 (clustered: Clusters − 1),
// P = P(T_df <= t), Upper = Mean + t_{confidence, df}·StdErr.
//
// The t bound trusts the normal approximation of the mean, which a few
// rows with large differences break (a candidate confidently wrong on a
// rare group: the differences are then very skewed and the bound covers
// less often than it says). So the candidate passes only when, besides
// Upper < margin, the sample is large enough for its skewness γ by
// Cochran's rule for the normal approximation of a mean (Cochran 1977,
// "Sampling Techniques", 3rd ed., section 2.15): n > 25·γ², n the
// effective row count (clustered: the clusters, γ the skewness of their
// totals' deviations), for γ > 0 only: the one-term Edgeworth expansion
// of the Studentized mean (Hall 1992, "The Bootstrap and Edgeworth
// Expansion", chapter 2: q(x) = γ(2x² + 1)/6) shows that an upper bound
// covers less than it says only when the differences are skewed to the
// right, the way a rare catastrophic loss skews them; skewed to the left (a
// candidate winning big on a few rows) the bound is conservative and the
// rule would only cost power. Sugden, Smith and Jones (2000, "Cochran's rule for
// simple random sampling", JRSS B 62(4): 787–793) refine it to n > 28 +
// 25·γ²; the constant 28 is a minimum sample size, a different rule, and
// is left out so that small slices keep their verdicts.
// The simulation in the checks package's tests (TestSoundness) shows the
// choice: on heavy-tailed differences the t bound alone passes 8.7% of
// 20,000-row holdouts at the margin, the t bound with this rule 1.7%
// (4,000 holdouts each), and the rule changes no verdict in the other
// settings; the one-term Edgeworth (Cornish–Fisher) correction of the
// bound, tried first, moved no rate at all.
//
// When StdErr is 0 (every difference equal), t is −Inf or +Inf by the
// sign of Mean − margin, or 0 when they are equal, Upper is Mean and γ is
// 0. The bootstrap interval is reported beside them and does not decide.
//
// Errors (kind errkind.BadInput): confidence not in (0, 1), margin not
// finite, EffectiveN (clustered: Clusters) at most 1.
func (a *Paired) NonInferiority(margin, confidence float64) (Test, error) {
	if !(confidence > 0 && confidence < 1) {
		return Test{}, errkind.New(errkind.BadInput, "confidence %v outside (0, 1)", confidence)
	}
	if math.IsNaN(margin) || math.IsInf(margin, 0) {
		return Test{}, errkind.New(errkind.BadInput, "margin %v is not finite", margin)
	}
	se, df, skew, n := a.spread()
	if math.IsNaN(se) {
		if a.clusters != nil {
			return Test{}, errkind.New(errkind.BadInput, "%d rows in %d clusters with weight: the test needs more than one cluster", a.rows, a.Clusters())
		}
		return Test{}, errkind.New(errkind.BadInput, "%d rows with effective size %.3g: the test needs more than one row with weight", a.rows, a.EffectiveN())
	}
	r := Test{Margin: margin, Confidence: confidence, N: a.rows, Clusters: a.Clusters(), MeanDiff: a.Mean(), StdErr: se, DF: df,
		Skewness: skew, MinRows: 25 * max(skew, 0) * max(skew, 0)}
	r.T = ratio(r.MeanDiff-margin, r.StdErr)
	r.P = studentsT(r.DF).CDF(r.T)
	r.Upper = r.MeanDiff
	if r.StdErr > 0 {
		r.Upper += tQuantile(confidence, r.DF) * r.StdErr
	}
	r.Pass = r.Upper < margin && n > r.MinRows
	if means := a.ReplicateMeans(); len(means) > 0 {
		sortFloats(means)
		r.BootstrapLower = QuantileSorted(means, 1-confidence)
		r.BootstrapUpper = QuantileSorted(means, confidence)
		r.BootstrapReplicas = len(means)
	}
	return r, nil
}

// ReplicateSums returns bootstrap replicate r's Σw·k and Σw·k·d; it panics
// when r is outside [0, Replicates()).
func (a *Paired) ReplicateSums(r int) (wk, wkd float64) {
	return a.rep[2*r].value(), a.rep[2*r+1].value()
}

// ReplicateMeans returns the mean Σw·k·d / Σw·k of every replicate with
// Σw·k > 0, in replicate order, in a new slice.
func (a *Paired) ReplicateMeans() []float64 {
	out := make([]float64, 0, a.reps)
	for r := range a.reps {
		wk, wkd := a.ReplicateSums(r)
		if wk > 0 {
			out = append(out, wkd/wk)
		}
	}
	return out
}

// replicateSums computes the sums Σw·k and Σw·k·d of bootstrap replicates
// [0, reps) over one chunk of rows into acc (2 per replicate): with the
// AVX-512 kernel when the CPU has it, else replicateSumsGo. Both sum each
// replicate's terms in row order with the same float64 operations (a
// product, then a sum; no fused multiply-add), so they agree bit for bit.
func replicateSums(keys []uint64, wv, wdv, acc []float64, reps int) {
	if haveBootKernel {
		replicateSumsKernel(keys, wv, wdv, acc, reps)
		return
	}
	replicateSumsGo(keys, wv, wdv, acc, reps)
}

// replicateSumsGo is replicateSums in Go: two replicates (one draw of the
// generator) per pass over the rows.
func replicateSumsGo(keys []uint64, wv, wdv, acc []float64, reps int) {
	pairs := reps &^ 1
	// The replicate pairs are independent: with more than one core, the
	// upper half runs on another goroutine. Each replicate's sums are
	// computed exactly as in one pass, so results do not depend on it.
	if mid := (pairs / 2) &^ 1; mid >= 32 && runtime.GOMAXPROCS(0) > 1 {
		var wg sync.WaitGroup
		wg.Add(1)
		go func() {
			defer wg.Done()
			replicatePairs(keys, wv, wdv, acc, mid, pairs)
		}()
		replicatePairs(keys, wv, wdv, acc, 0, mid)
		wg.Wait()
	} else {
		replicatePairs(keys, wv, wdv, acc, 0, pairs)
	}
	if reps%2 == 1 { // odd count: the last replicate uses a low half
		r := reps - 1
		step := uint64(r/2+1) * wyInc
		var sw, swd float64
		for i, key := range keys {
			k := float64(int64(poisson1(wymix(key+step) & 0xffffffff)))
			sw += float64(wv[i] * k) // rounded product: no fused multiply-add
			swd += float64(wdv[i] * k)
		}
		acc[2*r], acc[2*r+1] = sw, swd
	}
}

// replicatePairs computes the sums of bootstrap replicates [from, to)
// (both even) over one chunk of rows into acc.
func replicatePairs(keys []uint64, wv, wdv, acc []float64, from, to int) {
	for r := from; r < to; r += 2 {
		step := uint64(r/2+1) * wyInc
		var sw0, swd0, sw1, swd1 float64
		for i, key := range keys {
			s := key + step
			hi, lo := bits.Mul64(s, s^wyMul)
			u := hi ^ lo
			// Two Poisson(1) draws from the two 32-bit halves, inlined
			// (see poisson1).
			u0, u1 := u&0xffffffff, u>>32
			e0, e1 := poissonTop[u0>>24], poissonTop[u1>>24]
			k0 := e0&0xff + ge(u0, e0>>8)
			k1 := e1&0xff + ge(u1, e1>>8)
			if u0 >= tailStart || u1 >= tailStart { // 0.8%: no call here,
				// so the sums can stay in registers
				k0, k1 = 0, 0
				for _, c := range poissonCDF {
					k0 += ge(u0, c)
					k1 += ge(u1, c)
				}
			}
			f0, f1 := float64(int64(k0)), float64(int64(k1))
			// The conversions round each product (the Go spec's rule):
			// a build for GOAMD64=v3 would otherwise fuse the multiply
			// and add, and its sums would differ from other builds' and
			// from the kernel's.
			sw0 += float64(wv[i] * f0)
			swd0 += float64(wdv[i] * f0)
			sw1 += float64(wv[i] * f1)
			swd1 += float64(wdv[i] * f1)
		}
		q := acc[2*r : 2*r+4 : 2*r+4]
		q[0], q[1], q[2], q[3] = sw0, swd0, sw1, swd1
	}
}

// clusterSum is one cluster's Σw·d and Σw.
type clusterSum struct{ wd, w float64 }

// clusterAdd adds a row's w·d and w to cluster k.
func (a *Paired) clusterAdd(k uint64, wd, w float64) {
	c := a.clusters[k]
	if c == nil {
		c = &clusterSum{}
		a.clusters[k] = c
	}
	c.wd += wd
	c.w += w
}
