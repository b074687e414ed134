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

	// Scratch of add, reused from batch to batch.
	words []uint64 // the hashed rows' 8-byte words, row after row
	ends  []int32  // where each hashed row's words end
	rows  []uint64 // each hashed row's hash
}

func newRepeats(rows int64, clustered bool) *repeats {
	r := &repeats{Off: clustered}
	for rows>>r.Shift > repeatSample {
		r.Shift++
	}
	if !clustered {
		// Room for the hashes a sample of this size keeps (at most
		// repeatSample and an eighth, 18 MiB): growing the slice row by row
		// copied it over and over (a quarter of the repeat check's time on
		// a 2M-row holdout), and a slice grown past this still works.
		kept := rows >> r.Shift
		r.Hashes = make([]uint64, 0, kept+kept/8+64)
	}
	return r
}

// The row hash is FNV-1a 64 over each word's 8 little-endian bytes (the
// same hash as hash/fnv's New64a fed those bytes, which shard results from
// earlier builds carry).
const fnvOffset64, fnvPrime64 = 14695981039346656037, 1099511628211

// fnvWord feeds v's 8 little-endian bytes to the FNV-1a state h.
func fnvWord(h, v uint64) uint64 {
	h = (h ^ v&0xff) * fnvPrime64
	h = (h ^ (v>>8)&0xff) * fnvPrime64
	h = (h ^ (v>>16)&0xff) * fnvPrime64
	h = (h ^ (v>>24)&0xff) * fnvPrime64
	h = (h ^ (v>>32)&0xff) * fnvPrime64
	h = (h ^ (v>>40)&0xff) * fnvPrime64
	h = (h ^ (v>>48)&0xff) * fnvPrime64
	return (h ^ v>>56) * fnvPrime64
}

// add hashes the first n rows of f: a row's words are its item count,
// each (item, value bits) pair, then its dense values in name order.
//
// FNV-1a is one long chain of dependent multiplications per row, so the
// rows' words are first laid out one after another and then hashed four
// rows at a time, each in its own chain, which the processor overlaps.
// Hashes are kept in row order.
func (r *repeats) add(f *data.Frame, n int) error {
	if r == nil || r.Off {
		return nil
	}
	names := make([]string, 0, len(f.Dense))
	for k := range f.Dense {
		names = append(names, k)
	}
	slices.Sort(names)
	width := 0
	cols := make([][]float32, len(names))
	for j, k := range names {
		cols[j] = f.Dense[k]
		width += len(cols[j]) / n
	}
	words, ends := r.words[:0], r.ends[:0]
	for i := 0; i < n; i++ {
		lo, hi := f.Indptr[i], f.Indptr[i+1]
		if int(hi-lo)+width < repeatMinContent {
			continue
		}
		words = append(words, uint64(hi-lo))
		for p := lo; p < hi; p++ {
			words = append(words, uint64(uint32(f.Indices[p]))<<32|uint64(math.Float32bits(f.Values[p])))
		}
		for _, col := range cols {
			size := len(col) / n
			for _, v := range col[i*size : (i+1)*size] {
				words = append(words, uint64(math.Float32bits(v)))
			}
		}
		ends = append(ends, int32(len(words)))
	}
	r.words, r.ends = words, ends
	hs := slices.Grow(r.rows[:0], len(ends))[:len(ends)]
	r.rows = hs
	hashRows(words, ends, hs)
	for _, x := range hs {
		if r.Shift == 0 || x>>(64-r.Shift) == 0 {
			r.Hashes = append(r.Hashes, x)
		}
	}
	return nil
}

// hashRows sets hs[j] to the FNV-1a hash of row j's words,
// words[ends[j-1]:ends[j]] (every row has at least one word). Four lanes
// each hash a row; a lane that finishes stores its hash and takes the next
// row; when no row is left the other lanes finish one by one.
func hashRows(words []uint64, ends []int32, hs []uint64) {
	rows := len(ends)
	start := func(j int) int {
		if j == 0 {
			return 0
		}
		return int(ends[j-1])
	}
	if rows < 4 {
		for j := range rows {
			h := uint64(fnvOffset64)
			for _, v := range words[start(j):ends[j]] {
				h = fnvWord(h, v)
			}
			hs[j] = h
		}
		return
	}
	// Lane k hashes row rk, at word pk of row end ek, state hk.
	r0, r1, r2, r3 := 0, 1, 2, 3
	p0, p1, p2, p3 := 0, int(ends[0]), int(ends[1]), int(ends[2])
	e0, e1, e2, e3 := int(ends[0]), int(ends[1]), int(ends[2]), int(ends[3])
	h0, h1, h2, h3 := uint64(fnvOffset64), uint64(fnvOffset64), uint64(fnvOffset64), uint64(fnvOffset64)
	next := 4
	for {
		// fnvWord on each lane, written out: a call would not be inlined,
		// and the four states would go through memory around it.
		v0, v1, v2, v3 := words[p0], words[p1], words[p2], words[p3]
		h0 = (h0 ^ v0&0xff) * fnvPrime64
		h1 = (h1 ^ v1&0xff) * fnvPrime64
		h2 = (h2 ^ v2&0xff) * fnvPrime64
		h3 = (h3 ^ v3&0xff) * fnvPrime64
		h0 = (h0 ^ (v0>>8)&0xff) * fnvPrime64
		h1 = (h1 ^ (v1>>8)&0xff) * fnvPrime64
		h2 = (h2 ^ (v2>>8)&0xff) * fnvPrime64
		h3 = (h3 ^ (v3>>8)&0xff) * fnvPrime64
		h0 = (h0 ^ (v0>>16)&0xff) * fnvPrime64
		h1 = (h1 ^ (v1>>16)&0xff) * fnvPrime64
		h2 = (h2 ^ (v2>>16)&0xff) * fnvPrime64
		h3 = (h3 ^ (v3>>16)&0xff) * fnvPrime64
		h0 = (h0 ^ (v0>>24)&0xff) * fnvPrime64
		h1 = (h1 ^ (v1>>24)&0xff) * fnvPrime64
		h2 = (h2 ^ (v2>>24)&0xff) * fnvPrime64
		h3 = (h3 ^ (v3>>24)&0xff) * fnvPrime64
		h0 = (h0 ^ (v0>>32)&0xff) * fnvPrime64
		h1 = (h1 ^ (v1>>32)&0xff) * fnvPrime64
		h2 = (h2 ^ (v2>>32)&0xff) * fnvPrime64
		h3 = (h3 ^ (v3>>32)&0xff) * fnvPrime64
		h0 = (h0 ^ (v0>>40)&0xff) * fnvPrime64
		h1 = (h1 ^ (v1>>40)&0xff) * fnvPrime64
		h2 = (h2 ^ (v2>>40)&0xff) * fnvPrime64
		h3 = (h3 ^ (v3>>40)&0xff) * fnvPrime64
		h0 = (h0 ^ (v0>>48)&0xff) * fnvPrime64
		h1 = (h1 ^ (v1>>48)&0xff) * fnvPrime64
		h2 = (h2 ^ (v2>>48)&0xff) * fnvPrime64
		h3 = (h3 ^ (v3>>48)&0xff) * fnvPrime64
		h0 = (h0 ^ v0>>56) * fnvPrime64
		h1 = (h1 ^ v1>>56) * fnvPrime64
		h2 = (h2 ^ v2>>56) * fnvPrime64
		h3 = (h3 ^ v3>>56) * fnvPrime64
		p0++
		p1++
		p2++
		p3++
		if p0 == e0 || p1 == e1 || p2 == e2 || p3 == e3 {
			if next+4 > rows {
				break // fewer rows left than lanes could finish: drain below
			}
			if p0 == e0 {
				hs[r0], r0, h0, e0 = h0, next, fnvOffset64, int(ends[next])
				p0 = start(next)
				next++
			}
			if p1 == e1 {
				hs[r1], r1, h1, e1 = h1, next, fnvOffset64, int(ends[next])
				p1 = start(next)
				next++
			}
			if p2 == e2 {
				hs[r2], r2, h2, e2 = h2, next, fnvOffset64, int(ends[next])
				p2 = start(next)
				next++
			}
			if p3 == e3 {
				hs[r3], r3, h3, e3 = h3, next, fnvOffset64, int(ends[next])
				p3 = start(next)
				next++
			}
		}
	}
	// Finish the four lanes' rows, then the rows no lane took.
	for _, l := range [4]struct {
		r, p, e int
		h       uint64
	}{{r0, p0, e0, h0}, {r1, p1, e1, h1}, {r2, p2, e2, h2}, {r3, p3, e3, h3}} {
		h := l.h
		for _, v := range words[l.p:l.e] {
			h = fnvWord(h, v)
		}
		hs[l.r] = h
	}
	for j := next; j < rows; j++ {
		h := uint64(fnvOffset64)
		for _, v := range words[start(j):ends[j]] {
			h = fnvWord(h, v)
		}
		hs[j] = h
	}
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
