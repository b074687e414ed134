package checks

import (
	"fmt"
	"math"
	"slices"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks/stats"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
)

// clusterColumn returns the cluster column the gate uses: the policy's,
// else the one the holdout declared at push. A policy naming another
// column than the holdout declared is refused (errkind.BadInput).
func clusterColumn(cfg HoldoutConfig, hold *artifact.Holdout) (string, error) {
	declared := hold.Info.ClusterColumn
	switch {
	case cfg.ClusterColumn == "":
		return declared, nil
	case declared != "" && declared != cfg.ClusterColumn:
		return "", errkind.New(errkind.BadInput, "the policy's clusterColumn %q is not the cluster column %q the holdout declared when it was pushed", cfg.ClusterColumn, declared)
	}
	return cfg.ClusterColumn, nil
}

// needUniqueRowIDs refuses (errkind.BadInput) a holdout with a row_id
// given twice, or, with a cluster column, given in two clusters. A holdout
// whose push checked it with the same column (or with none, which is
// stricter) is not read again.
func needUniqueRowIDs(hold *artifact.Holdout, cfg HoldoutConfig) error {
	col, err := clusterColumn(cfg, hold)
	if err != nil {
		return err
	}
	if hold.Info.RowIDsChecked && (hold.Info.ClusterColumn == "" || hold.Info.ClusterColumn == col) {
		return nil
	}
	_, err = hold.Scan(col)
	return err
}

// newPaired returns the paired accumulator: clustered when the holdout
// has a cluster column.
func newPaired(clusterCol string, seed uint64, replicas int) (*stats.Paired, error) {
	if clusterCol != "" {
		return stats.NewClusteredPaired(seed, replicas)
	}
	return stats.NewPaired(seed, replicas)
}

// addPaired adds rows with their cluster keys when a is clustered.
func addPaired(a *stats.Paired, ids []int64, clusters []uint64, d []float64, w []float32) error {
	if a.Clustered() {
		return a.AddBatchClustered(ids, clusters[:len(d)], d, w)
	}
	return a.AddBatch(ids, d, w)
}

// holdoutRuleFindings are the findings beside the mean test: how rows
// were grouped, which bound decided, confident mistakes, repeated rows.
func holdoutRuleFindings(st *holdoutState, ni NonInferiority, cfg HoldoutConfig) []Finding {
	var out []Finding
	if st.ClusterColumn != "" {
		out = append(out, Finding{Status: StatusPass, Code: "holdout.clusters", Where: st.ClusterColumn,
			Message: fmt.Sprintf("%d rows in %d clusters by column %q: cluster-robust standard error, %g degrees of freedom; the bootstrap resamples clusters",
				ni.N, ni.Clusters, st.ClusterColumn, ni.DF)})
	}
	if n := ni.DF + 1; ni.Upper < ni.Margin && !(n > ni.MinRows) {
		what := "rows"
		if ni.Clusters > 0 {
			what = "clusters"
		}
		out = append(out, Finding{Status: StatusFail, Code: "holdout.skew", Value: ptr(n), Limit: ptr(ni.MinRows),
			Message: fmt.Sprintf("a few rows dominate the difference (skewness %.1f): the t bound %+.5f < margin %.5f cannot be trusted with %.0f %s; Cochran's rule asks for more than 25·skewness² = %.0f",
				ni.Skewness, ni.Upper, ni.Margin, n, what, ni.MinRows)})
	}
	if st.Tail != nil {
		if f, ok := tailFinding(st.Tail.Summary(), cfg.Margin, cfg.TailAction); ok {
			out = append(out, f)
		}
	}
	if f, ok := st.Repeats.finding(); ok {
		out = append(out, f)
	}
	return out
}

// tailFinding applies the tail rule (see stats.Tail and policy.Tail):
// the flagged rows' exposure reaching the margin fails or warns by
// action; otherwise a passing finding counts them. ok is false when the
// rule is off.
func tailFinding(s stats.TailSummary, margin float64, action string) (Finding, bool) {
	if action == policy.TailOff {
		return Finding{}, false
	}
	f := Finding{Status: StatusPass, Code: "holdout.tail", Value: ptr(s.Exposure), Limit: ptr(margin)}
	worst := ""
	if len(s.Worst) > 0 && s.Worst[0].Excess > s.Threshold {
		r := s.Worst[0]
		worst = fmt.Sprintf("; worst row_id %d: candidate %.3g, baseline %.3g, %.1f nats more if the label were the other one", r.RowID, r.Candidate, r.Baseline, r.Excess)
	}
	if s.Exposure >= margin {
		f.Status = StatusFail
		if action == policy.TailWarn {
			f.Status = StatusWarn
		}
		f.Message = fmt.Sprintf("confident mistakes possible: on %d rows the candidate bets more than %g nats harder than the baseline; were the baseline right there, they alone would add %.5f to the mean difference, ≥ margin %.5f%s",
			s.Flagged, s.Threshold, s.Exposure, margin, worst)
		return f, true
	}
	f.Message = fmt.Sprintf("%d rows where the candidate bets more than %g nats harder than the baseline; their exposure %.5f < margin %.5f%s",
		s.Flagged, s.Threshold, s.Exposure, margin, worst)
	return f, true
}

// repeatSample bounds the rows whose content hash a holdout check keeps:
// beyond it, a deterministic sample by hash value (the same in every
// shard, and rows with the same content are kept or left together).
const repeatSample = 1 << 21

// repeatMinContent is the least number of values (items plus dense
// inputs) a row must carry for an exact repeat of it to count. Two
// independent listeners who each played one or two episodes of the same
// popular shows match exactly by chance, so short rows say nothing about
// dependence; matching on three or more values (with play counts or
// continuous features among them) is unlikely without it. Our own choice,
// made after the demo's encoder holdout (mostly listeners with one or two
// shows) warned on 12% of its rows with no listener repeated.
const repeatMinContent = 3

// repeats finds rows repeated within a holdout: the same items, values
// and dense inputs as read for the candidate, among rows that carry at
// least repeatMinContent values. It is mergeable: shards keep the hashes
// of their sampled rows.
type repeats struct {
	// Off when a cluster column groups rows: repeats are then expected.
	Off bool
	// Shift: a row is kept when its hash's top Shift bits are 0.
	Shift  uint
	Hashes []uint64
}

func newRepeats(rows int64, clustered bool) *repeats {
	r := &repeats{Off: clustered}
	for rows>>r.Shift > repeatSample {
		r.Shift++
	}
	return r
}

// add hashes the first n rows of f.
func (r *repeats) add(f *data.Frame, n int) error {
	if r == nil || r.Off {
		return nil
	}
	names := make([]string, 0, len(f.Dense))
	for k := range f.Dense {
		names = append(names, k)
	}
	slices.Sort(names)
	// FNV-1a over each value's 8 little-endian bytes (the same hash as
	// hash/fnv's New64a fed those bytes, which shard results from earlier
	// builds carry), written out so that no call goes through an interface.
	const offset64, prime64 = 14695981039346656037, 1099511628211
	var h uint64
	put := func(v uint64) {
		for k := 0; k < 64; k += 8 {
			h ^= (v >> k) & 0xff
			h *= prime64
		}
	}
	width := 0
	for _, k := range names {
		width += len(f.Dense[k]) / n
	}
	for i := 0; i < n; i++ {
		lo, hi := f.Indptr[i], f.Indptr[i+1]
		if int(hi-lo)+width < repeatMinContent {
			continue
		}
		h = offset64
		put(uint64(hi - lo))
		for p := lo; p < hi; p++ {
			put(uint64(uint32(f.Indices[p]))<<32 | uint64(math.Float32bits(f.Values[p])))
		}
		for _, k := range names {
			col := f.Dense[k]
			size := len(col) / n
			for _, v := range col[i*size : (i+1)*size] {
				put(uint64(math.Float32bits(v)))
			}
		}
		if x := h; r.Shift == 0 || x>>(64-r.Shift) == 0 {
			r.Hashes = append(r.Hashes, x)
		}
	}
	return nil
}

func (r *repeats) merge(o *repeats) error {
	if r == nil || o == nil {
		return nil
	}
	if r.Off != o.Off || r.Shift != o.Shift {
		return errkind.New(errkind.BadInput, "shard results checked repeated rows differently and cannot be merged")
	}
	r.Hashes = append(r.Hashes, o.Hashes...)
	return nil
}

// finding counts the rows that repeat an earlier row's content; ok is
// false when there are none or the check is off.
func (r *repeats) finding() (Finding, bool) {
	if r == nil || r.Off {
		return Finding{}, false
	}
	hs := slices.Clone(r.Hashes)
	slices.Sort(hs)
	rep := 0
	for i := 1; i < len(hs); i++ {
		if hs[i] == hs[i-1] {
			rep++
		}
	}
	if rep == 0 {
		return Finding{}, false
	}
	where := fmt.Sprintf("%d of %d rows with at least %d items and dense values", rep, len(hs), repeatMinContent)
	if r.Shift > 0 {
		where += fmt.Sprintf(" in a 1/%d sample of the holdout", 1<<r.Shift)
	}
	return Finding{Status: StatusWarn, Code: "holdout.repeats", Value: ptr(float64(rep)),
		Message: where + " repeat another row's items, values and dense inputs: rows that come from one listener are not independent, and the test's error rates assume they are; declare the listener column as the cluster column (push --cluster-column, or the policy's clusterColumn)"}, true
}
