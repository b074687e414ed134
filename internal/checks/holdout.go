package checks

import (
	"context"
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks/stats"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/score"
)

// HoldoutConfig holds the holdout check's rules.
type HoldoutConfig struct {
	Enabled bool
	// Margin is the non-inferiority margin on the mean per-row loss
	// difference (candidate − baseline); Confidence the one-sided level.
	Margin     float64
	Confidence float64
	// Replicas of the Poisson bootstrap (reported beside the t test) and
	// the seed of its counter-based draws.
	Replicas int
	Seed     uint64
	// NonzeroQuantiles: rows are sliced by their nonzero count at these
	// quantiles of the candidate's training statistics (stats.json
	// nonzerosPerRow.qNN). Rows above AnomalyQuantile form an anomalous
	// slice whose weights are multiplied by AnomalyWeight.
	NonzeroQuantiles []float64
	AnomalyQuantile  float64
	AnomalyWeight    float64
	// PerSliceMargin, when set, tests each slice too; FailOnSlice makes a
	// failing slice fail the check (else it warns).
	PerSliceMargin *float64
	FailOnSlice    bool
	// MinSliceRows: slices with fewer rows are reported, not judged
	// (default DefaultMinSliceRows).
	MinSliceRows int
	// First-release thresholds for scorers (nil: not enforced).
	MaxLogLoss, MaxNormalizedEntropy, MinAUC, MaxECE *float64
	// Encoders: the reconstruction loss per row is
	// Alpha·BCE(nonzero targets) + (1−Alpha)·BCE(all outputs), observed
	// entries weighted up against unobserved ones (Hu, Koren, Volinsky,
	// ICDM 2008; Alpha = 1 is AutoRec's observed-entry loss, Sedhain et al.,
	// WWW 2015); rows whose nonzero count n exceeds the WeightQuantile
	// training quantile q are weighted (q/n)^WeightPower (Huber-type weights
	// with a quantile threshold; see policy.HoldoutCheck.RowWeight).
	// MaxReconstruction is the first-release threshold.
	Alpha             float64
	WeightQuantile    float64
	WeightPower       float64
	MaxReconstruction *float64
	// ClusterColumn names the holdout column grouping rows that are not
	// independent ("" : the holdout's declared one, if any); see
	// clusterColumn.
	ClusterColumn string
	// TailExcess and TailAction: the label-free rule on confident
	// mistakes (scorers; see tailFinding).
	TailExcess float64
	TailAction string
	// BatchSize rows per batch (default 4096); Threads for the runtime.
	BatchSize int
	Threads   int
}

// NonzeroQuantile reads a training quantile of nonzeros per row from a
// model's stats: stats.json's "nonzerosPerRow" object with keys "q50",
// "q90", "q99", "q999" for the 0.5, 0.9, 0.99, 0.999 quantiles.
func NonzeroQuantile(st map[string]any, q float64) (float64, bool) {
	nz, ok := st["nonzerosPerRow"].(map[string]any)
	if !ok {
		return 0, false
	}
	key := "q" + strings.ReplaceAll(strconv.FormatFloat(q*100, 'f', -1, 64), ".", "")
	v, ok := nz[key].(float64)
	return v, ok
}

type sliceAcc struct {
	name       string
	cand, base *stats.Binary
	paired     *stats.Paired
	rc, rb     *stats.Recon
	plain      plainLoss // unweighted per-row losses (weights.go)
}

// Holdout scores the candidate and the baseline on the same digest-pinned
// holdout and compares them with a paired non-inferiority test (scorers:
// log loss; encoders: reconstruction loss), overall and per slice. A
// first release is held to the absolute thresholds.
func Holdout(ctx context.Context, cand, base *score.Model, hold *artifact.Holdout, cfg HoldoutConfig, progress func(done, total int64)) CheckResult {
	res := CheckResult{Name: CheckHoldout}
	det, err := holdoutRun(ctx, cand, base, hold, cfg, progress, &res)
	if err != nil {
		res.Findings = append(res.Findings, Finding{Status: StatusFail, Code: "holdout.error", Message: err.Error()})
		res.Status, res.Summary = StatusFail, err.Error()
		return res
	}
	res.Holdout = det
	finish(&res)
	return res
}

func holdoutRun(ctx context.Context, cand, base *score.Model, hold *artifact.Holdout, cfg HoldoutConfig, progress func(done, total int64), res *CheckResult) (*HoldoutDetail, error) {
	st, err := accumulate(ctx, cand, base, hold, cfg, 0, -1, progress)
	if err != nil {
		return nil, err
	}
	return finalize(st, cfg, res)
}

// accumulate scores rows [lo, hi) of the holdout (hi < 0: to the end)
// with the candidate and the baseline and returns the mergeable sums.
func accumulate(ctx context.Context, cand, base *score.Model, hold *artifact.Holdout, cfg HoldoutConfig, lo, hi int64, progress func(done, total int64)) (*holdoutState, error) {
	kind := cand.Loaded.Spec.Kind
	if base != nil && base.Loaded.Spec.Kind != kind {
		return nil, errkind.New(errkind.BadInput, "the baseline is a %s, the candidate a %s", base.Loaded.Spec.Kind, kind)
	}
	st := &holdoutState{Kind: kind, HasBaseline: base != nil, Slices: map[string]*sliceAcc{}, Seed: cfg.Seed, Replicas: cfg.Replicas}
	if cfg.BatchSize <= 0 {
		cfg.BatchSize = 4096
	}
	encoder := kind == model.KindEncoder
	if encoder && cand.Net.Reconstruction() == "" {
		return nil, errkind.New(errkind.BadInput, "the encoder %s has no reconstruction layer: its reconstruction loss cannot be measured", cand.Loaded.Spec.Name)
	}
	clusterCol, err := clusterColumn(cfg, hold)
	if err != nil {
		return nil, err
	}
	st.ClusterColumn = clusterCol
	open := func(m *score.Model) (data.Reader, error) {
		opts := m.ReadOptions(hold.Artifact.Repository+"@"+hold.Artifact.Desc.Digest.String(), !encoder)
		opts.ClusterColumn = clusterCol
		return hold.Open(opts)
	}
	rc, err := open(cand)
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	// One read serves both models when they map ids alike and the
	// baseline reads no dense input the candidate lacks.
	shared := base != nil && sameInputs(cand, base)
	var rb data.Reader
	if base != nil && !shared {
		if rb, err = open(base); err != nil {
			return nil, err
		}
		defer rb.Close()
	}
	// Slices and weights by nonzero count, from the baseline or the
	// holdout, never from the candidate (weights.go).
	qstats, rw := quantileSource(base, hold)
	type bound struct {
		name  string
		upper float64
	}
	var bounds []bound
	lower := ""
	for _, q := range cfg.NonzeroQuantiles {
		v, ok := NonzeroQuantile(qstats, q)
		if !ok {
			st.Findings = append(st.Findings, missingQuantile(rw, q, "rows are not sliced by it"))
			continue
		}
		if lower != "" && v <= bounds[len(bounds)-1].upper {
			continue // equal quantiles make an empty slice
		}
		name := fmt.Sprintf("nonzeros ≤ %g", v)
		if lower != "" {
			name = fmt.Sprintf("nonzeros in (%s, %g]", lower, v)
		}
		bounds = append(bounds, bound{name, v})
		lower = fmt.Sprintf("%g", v)
	}
	anomaly := math.Inf(1)
	if cfg.AnomalyQuantile > 0 {
		if v, ok := NonzeroQuantile(qstats, cfg.AnomalyQuantile); ok {
			anomaly = v
			rw.AnomalyAbove, rw.AnomalyWeight = ptr(v), cfg.AnomalyWeight
		} else {
			st.Findings = append(st.Findings, missingQuantile(rw, cfg.AnomalyQuantile, "anomalous rows are not separated"))
		}
	}
	weightQ := math.Inf(1)
	if encoder && cfg.WeightQuantile > 0 {
		if v, ok := NonzeroQuantile(qstats, cfg.WeightQuantile); ok {
			weightQ = v
			rw.DownWeightAbove, rw.DownWeightPower = ptr(v), cfg.WeightPower
		}
	}
	st.Weights = rw
	anomalousName, aboveName := fmt.Sprintf("anomalous (nonzeros > %g)", anomaly), "all rows"
	if lower != "" {
		aboveName = fmt.Sprintf("nonzeros > %s", lower)
	}
	sliceOf := func(nnz int) string {
		if float64(nnz) > anomaly {
			return anomalousName
		}
		for _, b := range bounds {
			if float64(nnz) <= b.upper {
				return b.name
			}
		}
		return aboveName
	}
	// Rows are also grouped by the holdout's own slice column (a cohort,
	// a region...), when its summary lists between 1 and maxHoldoutSlices
	// values: every shard sees the same list, so sharded runs agree.
	segments := len(hold.Info.Slices) > 0 && len(hold.Info.Slices) <= maxHoldoutSlices
	if len(hold.Info.Slices) > maxHoldoutSlices {
		st.Findings = append(st.Findings, Finding{Status: StatusWarn, Code: "holdout.slices",
			Message: fmt.Sprintf("the holdout's slice column has %d values; per-value results are reported for at most %d", len(hold.Info.Slices), maxHoldoutSlices)})
	}
	segNames := map[string]string{}
	segmentOf := func(v string) string {
		name, ok := segNames[v]
		if !ok {
			name = SegmentSliceName(v)
			segNames[v] = name
		}
		return name
	}
	// Slices get the paired t test without bootstrap replicates: the
	// bootstrap (R draws per row) is the gate's costliest statistic, and it
	// is reported, not deciding, so it runs once, over all rows.
	newAcc := func(name string, replicas int) (*sliceAcc, error) {
		a := &sliceAcc{name: name}
		var err error
		if a.paired, err = newPaired(clusterCol, cfg.Seed, replicas); err != nil {
			return nil, err
		}
		if encoder {
			wf := func(n int) float64 {
				if float64(n) <= weightQ {
					return 1
				}
				return math.Pow(weightQ/float64(n), cfg.WeightPower)
			}
			if a.rc, err = stats.NewRecon(cfg.Alpha, wf); err != nil {
				return nil, err
			}
			if a.rb, err = stats.NewRecon(cfg.Alpha, wf); err != nil {
				return nil, err
			}
		} else {
			a.cand, a.base = stats.NewBinary(), stats.NewBinary()
		}
		return a, nil
	}
	all, err := newAcc("all rows", cfg.Replicas)
	if err != nil {
		return nil, err
	}
	st.All = all
	if !encoder && base != nil && (cfg.TailAction == policy.TailFail || cfg.TailAction == policy.TailWarn) {
		if st.Tail, err = stats.NewTail(cfg.TailExcess); err != nil {
			return nil, err
		}
	}
	st.Repeats = newRepeats(hold.Info.Rows, clusterCol != "")
	slice := func(name string) (*sliceAcc, error) {
		if a, ok := st.Slices[name]; ok {
			return a, nil
		}
		a, err := newAcc(name, 0)
		st.Slices[name] = a
		return a, err
	}
	diffHist, err := stats.NewHistogram(-0.5, 0.5, 50)
	if err != nil {
		return nil, err
	}
	st.Diff = diffHist
	runC := cand.Net.NewRunner(cfg.Threads)
	defer runC.Close()
	var runB *model.Runner
	if base != nil {
		runB = base.Net.NewRunner(cfg.Threads)
		defer runB.Close()
	}
	var scr struct {
		p, y, w []float32
		ids     []int64
		cl      []uint64
		d, l    []float64
	}
	var (
		qc, qb    []float32
		tc, tb    []float32
		lc, lb, d []float64
		w         []float32
		rows      int64
	)
	// A shard skips the row groups before its first row unread (a ranged
	// holdout blob then fetches none of their bytes).
	if lo > 0 {
		if sk, ok := rc.(data.Skipper); ok {
			n, err := sk.SkipRows(lo)
			if err != nil {
				return nil, err
			}
			if rb != nil {
				sb, ok := rb.(data.Skipper)
				if !ok {
					return nil, errkind.New(errkind.Internal, "holdout readers differ in kind")
				}
				if m, err := sb.SkipRows(n); err != nil {
					return nil, fmt.Errorf("baseline's reading of the holdout: %w", err)
				} else if m != n {
					return nil, errkind.New(errkind.Internal, "holdout readers disagree: skipped %d and %d rows", n, m)
				}
			}
			lo -= n
			if hi >= 0 {
				hi -= n
			}
		}
	}
	// Reading runs in its own goroutine, a few batches ahead of the
	// forward pass and the statistics, which take the batches in file
	// order: the numbers are those of a sequential run, bit for bit.
	batches, stopReading := readAhead(ctx, rc, rb, cfg.BatchSize, lo, hi)
	defer stopReading()
	// process adds a batch to the statistics (and, for an encoder, runs
	// its forward pass); a scorer's predictions are fp.pc and fp.pb.
	// Buffers process reuses from batch to batch.
	var (
		nnzBuf   []int
		groupBuf [3][]rowGroup
	)
	process := func(fp *framePair) error {
		n := fp.n
		pc, pb := fp.pc, fp.pb
		fc, fb := &fp.fc, &fp.fb
		if shared {
			fb = fc
		}
		if err := st.Repeats.add(fc, n); err != nil {
			return err
		}
		tStats := time.Now()
		forward := 0.0
		w = append(w[:0], fc.Weights[:n]...)
		if cap(nnzBuf) < n {
			nnzBuf = make([]int, n)
		}
		nnz := nnzBuf[:n]
		for i := 0; i < n; i++ {
			if w[i] != 1 {
				st.Weights.HoldoutWeights = true
			}
			nnz[i] = int(fc.Indptr[i+1] - fc.Indptr[i])
			if float64(nnz[i]) > anomaly {
				w[i] *= float32(cfg.AnomalyWeight)
			}
		}
		lc, lb, d = grow64(lc, n), grow64(lb, n), grow64(d, n)
		groups, err := groupRows(n, func(i int) string { return sliceOf(nnz[i]) }, slice, groupBuf[0])
		if err != nil {
			return err
		}
		groupBuf[0] = groups
		if segments {
			segGroups, err := groupRows(n, func(i int) string { return segmentOf(fc.Slices[i]) }, slice, groupBuf[1])
			if err != nil {
				return err
			}
			groupBuf[1] = segGroups
			// A list of its own: the buffers' groups past their
			// lengths keep row lists for the next batch.
			groups = append(append(groupBuf[2][:0], groups...), segGroups...)
			groupBuf[2] = groups
		}
		if encoder {
			tf := time.Now()
			if qc, tc, err = reconstruct(runC, cand, &fc.Batch, qc, tc); err != nil {
				return fmt.Errorf("candidate: %w", err)
			}
			if base != nil {
				if qb, tb, err = reconstruct(runB, base, &fb.Batch, qb, tb); err != nil {
					return fmt.Errorf("baseline: %w", err)
				}
			}
			forward += time.Since(tf).Seconds()
			wc, wb := cand.Net.Width(cand.Net.Reconstruction()), 0
			if base != nil {
				wb = base.Net.Width(base.Net.Reconstruction())
			}
			// Per row: accumulate overall and per slice.
			for i := 0; i < n; i++ {
				acc, err := slice(sliceOf(nnz[i]))
				if err != nil {
					return err
				}
				accs := []*sliceAcc{all, acc}
				if segments {
					seg, err := slice(segmentOf(fc.Slices[i]))
					if err != nil {
						return err
					}
					accs = append(accs, seg)
				}
				for _, a := range accs {
					c, err := a.rc.AddRow(qc[i*wc:(i+1)*wc], tc[i*wc:(i+1)*wc])
					if err != nil {
						return fmt.Errorf("row %d: %w", rows+int64(i)+1, err)
					}
					lc[i] = c
					if base != nil {
						b, err := a.rb.AddRow(qb[i*wb:(i+1)*wb], tb[i*wb:(i+1)*wb])
						if err != nil {
							return fmt.Errorf("row %d: %w", rows+int64(i)+1, err)
						}
						lb[i] = b
					}
				}
				if len(st.Examples) < 4 && nnz[i] >= 2 {
					st.Examples = append(st.Examples, example(cand, base, fc, fb, i, qc[i*wc:(i+1)*wc], tc[i*wc:(i+1)*wc], qb, wb))
				}
			}
		} else {
			y := fc.Labels[:n]
			if err := all.cand.AddBatchLoss(pc[:n], y, w, lc); err != nil {
				return err
			}
			if base != nil {
				if err := all.base.AddBatchLoss(pb[:n], y, w, lb); err != nil {
					return err
				}
				if st.Tail != nil {
					if err := st.Tail.AddBatch(fc.RowIDs[:n], pc[:n], pb[:n], y, w); err != nil {
						return err
					}
				}
			}
			// Per slice, in one batch call each.
			for _, g := range groups {
				gp, gy, gw := gather(pc, g.rows, &scr.p), gather(y, g.rows, &scr.y), gather(w, g.rows, &scr.w)
				if err := g.acc.cand.AddBatchWithLoss(gp, gy, gw, gather64(lc, g.rows, &scr.l)); err != nil {
					return err
				}
				if base != nil {
					if err := g.acc.base.AddBatchWithLoss(gather(pb, g.rows, &scr.p), gy, gw, gather64(lb, g.rows, &scr.l)); err != nil {
						return err
					}
				}
			}
		}
		for i := 0; i < n; i++ {
			all.plain.add(lc[i], lb[i])
		}
		for _, g := range groups {
			for _, i := range g.rows {
				g.acc.plain.add(lc[i], lb[i])
			}
		}
		if base != nil {
			for i := 0; i < n; i++ {
				d[i] = lc[i] - lb[i]
			}
			if err := addPaired(all.paired, fc.RowIDs[:n], fc.Clusters, d, w); err != nil {
				return err
			}
			if err := diffHist.AddBatch(d, w); err != nil {
				return err
			}
			for _, g := range groups {
				ids := scr.ids[:0]
				ds := scr.d[:0]
				cl := scr.cl[:0]
				for _, i := range g.rows {
					ids = append(ids, fc.RowIDs[i])
					ds = append(ds, d[i])
					if len(fc.Clusters) > 0 {
						cl = append(cl, fc.Clusters[i])
					}
				}
				scr.ids, scr.d, scr.cl = ids, ds, cl
				if err := addPaired(g.acc.paired, ids, cl, ds, gather(w, g.rows, &scr.w)); err != nil {
					return err
				}
			}
		}
		if encoder { // a scorer's forward pass is timed where it runs
			st.Forward += forward
		}
		st.Stats += time.Since(tStats).Seconds() - forward
		rows += int64(n)
		if progress != nil {
			progress(rows, hold.Info.Rows)
		}
		return nil
	}
	// A scorer's batches go through a pipeline: this goroutine runs the
	// forward pass of a batch while another adds the one before to the
	// statistics (and the reader reads the one after). Each stage takes
	// the batches in file order, so the numbers are a sequential run's.
	// An encoder's forward pass and statistics run here, in turn.
	var (
		toStats   chan *framePair
		statsDone chan struct{}
		statsErr  error
		statsBad  atomic.Bool
	)
	if !encoder {
		toStats, statsDone = make(chan *framePair, 1), make(chan struct{})
		go func() {
			defer close(statsDone)
			for fp := range toStats {
				if !statsBad.Load() {
					if err := process(fp); err != nil {
						statsErr = err
						statsBad.Store(true)
					}
				}
				fp.release()
			}
		}()
	}
	// finish waits for the statistics of the batches sent so far; an
	// error there came first in file order.
	finish := sync.OnceValue(func() error {
		if toStats != nil {
			close(toStats)
			<-statsDone
		}
		return statsErr
	})
	defer finish()
	fail := func(err error) (*holdoutState, error) {
		if serr := finish(); serr != nil {
			return nil, serr
		}
		return nil, err
	}
	for {
		if err := ctx.Err(); err != nil {
			return fail(err)
		}
		if statsBad.Load() {
			return fail(nil)
		}
		fp, ok := <-batches
		if !ok {
			if err := ctx.Err(); err != nil {
				return fail(err)
			}
			return fail(errkind.New(errkind.Internal, "holdout reader stopped without a reason"))
		}
		if fp.err != nil {
			return fail(fp.err)
		}
		if fp.end {
			st.Read += fp.readSeconds
			break
		}
		if encoder {
			if err := process(fp); err != nil {
				return nil, err
			}
			fp.release()
			continue
		}
		fc, fb := &fp.fc, &fp.fb
		if shared {
			fb = fc
		}
		tf := time.Now()
		var err error
		if fp.pc, err = runC.Run(&fc.Batch, cand.Net.Output(), fp.pc); err != nil {
			fp.release()
			return fail(fmt.Errorf("candidate: %w", err))
		}
		if base != nil {
			if fp.pb, err = runB.Run(&fb.Batch, base.Net.Output(), fp.pb); err != nil {
				fp.release()
				return fail(fmt.Errorf("baseline: %w", err))
			}
		}
		st.Forward += time.Since(tf).Seconds()
		toStats <- fp
	}
	if err := finish(); err != nil {
		return nil, err
	}
	st.Rows = rows
	st.Anomaly, st.Lower = anomaly, lower
	return st, nil
}

// finalize turns accumulated sums into the holdout check's numbers,
// findings and verdict.
func finalize(st *holdoutState, cfg HoldoutConfig, res *CheckResult) (*HoldoutDetail, error) {
	res.Findings = append(res.Findings, st.Findings...)
	encoder := st.Kind == model.KindEncoder
	all := st.All
	rows := st.Rows
	rw := st.Weights
	det := &HoldoutDetail{Kind: st.Kind, Examples: st.Examples, Weights: &rw}
	res.Phases = map[string]float64{"read": st.Read, "forward": st.Forward, "statistics": st.Stats}
	hasBase := st.HasBaseline
	if rows == 0 {
		return nil, errkind.New(errkind.BadInput, "the holdout has no rows")
	}
	det.Candidate = metricsOf(all, true)
	if hasBase {
		m := metricsOf(all, false)
		det.Baseline = &m
	}
	if !encoder {
		for _, b := range all.cand.Calibration() {
			det.CalibrationCandidate = append(det.CalibrationCandidate, CalibrationBin(b))
		}
		if hasBase {
			for _, b := range all.base.Calibration() {
				det.CalibrationBaseline = append(det.CalibrationBaseline, CalibrationBin(b))
			}
		}
	}
	lossName := "log loss"
	if encoder {
		lossName = "reconstruction loss"
	}
	if hasBase {
		det.LossDiff = &Histogram{Min: st.Diff.Min, Max: st.Diff.Max, Counts: st.Diff.Counts}
		t, err := all.paired.NonInferiority(cfg.Margin, cfg.Confidence)
		if err != nil {
			return nil, err
		}
		ni := finiteTest(NonInferiority(t))
		det.Test = &ni
		f := Finding{Status: StatusPass, Code: "holdout.noninferiority", Value: ptr(ni.Upper), Limit: ptr(cfg.Margin)}
		if ni.Pass {
			f.Message = fmt.Sprintf("mean %s difference %+.5f, upper %.0f%% bound %+.5f < margin %.5f (t = %.2f, p = %.3g, n = %d); bootstrap [%+.5f, %+.5f]",
				lossName, ni.MeanDiff, 100*cfg.Confidence, ni.Upper, cfg.Margin, ni.T, ni.P, ni.N, ni.BootstrapLower, ni.BootstrapUpper)
		} else {
			f.Status = StatusFail
			f.Message = fmt.Sprintf("the candidate may lose %s: mean difference %+.5f, upper %.0f%% bound %+.5f ≥ margin %.5f (p = %.3g, n = %d)",
				lossName, ni.MeanDiff, 100*cfg.Confidence, ni.Upper, cfg.Margin, ni.P, ni.N)
		}
		res.Findings = append(res.Findings, f)
		res.Findings = append(res.Findings, holdoutRuleFindings(st, ni, cfg)...)
		diffName := "difference"
		if !encoder && st.Weights.Weighted() {
			diffName = "weighted difference"
		}
		res.Summary = fmt.Sprintf("%s %.5f vs baseline %.5f%s; upper bound of the %s %+.5f vs margin %.5f",
			lossName, lossOf(det.Candidate, encoder), lossOf(*det.Baseline, encoder), weightedPart(det, st.Weights), diffName, ni.Upper, cfg.Margin)
	} else {
		res.Summary = fmt.Sprintf("first release: %s %.5f%s", lossName, lossOf(det.Candidate, encoder), weightedPart(det, st.Weights))
		firstRelease(det.Candidate, encoder, cfg, res)
	}
	// Slices, sorted by name.
	slices := st.Slices
	names := make([]string, 0, len(slices))
	for k := range slices {
		names = append(names, k)
	}
	sort.Strings(names)
	// Every slice is reported; a slice warns (or with FailOnSlice fails)
	// only on evidence of harm after Holm's correction (slices.go).
	margin := cfg.Margin
	if cfg.PerSliceMargin != nil {
		margin = *cfg.PerSliceMargin
	}
	minRows := cfg.MinSliceRows
	if minRows <= 0 {
		minRows = DefaultMinSliceRows
	}
	tests := make([]*NonInferiority, len(names))
	rowsOf := make([]int64, len(names))
	for i, name := range names {
		a := slices[name]
		sr := SliceResult{Name: name, Candidate: metricsOf(a, true), Status: StatusPass}
		sr.Rows = sr.Candidate.Rows
		rowsOf[i] = sr.Rows
		if !encoder && cfg.PerSliceMargin != nil && a.cand != nil && a.cand.Rows() > 0 {
			// A slice the policy tests must be able to show ranking.
			if auc, _ := a.cand.AUC(); math.IsNaN(auc) {
				st := StatusWarn
				if cfg.FailOnSlice {
					st = StatusFail
				}
				sr.Status = st
				res.Findings = append(res.Findings, Finding{Status: st, Code: "holdout.slice-one-class", Where: name,
					Message: fmt.Sprintf("slice %q (%d rows) has labels of one class only: its AUC is undefined and it cannot show whether the candidate ranks; the holdout needs both labels in every tested slice", name, sr.Rows)})
			}
		}
		if hasBase {
			m := metricsOf(a, false)
			sr.Baseline = &m
			if t, err := a.paired.NonInferiority(margin, cfg.Confidence); err == nil {
				ni := finiteTest(NonInferiority(t))
				sr.Test, tests[i] = &ni, &ni
			}
		}
		det.Slices = append(det.Slices, sr)
	}
	if hasBase && cfg.PerSliceMargin != nil {
		harms := judgeSlices(tests, rowsOf, margin, cfg.Confidence, minRows)
		for i := range det.Slices {
			sr := &det.Slices[i]
			sr.Harm = harms[i]
			switch {
			case harms[i] == nil:
				if sr.Status == StatusPass { // keep a one-class slice's warning or failure
					sr.Status = StatusSkip
				}
				sr.Note = fmt.Sprintf("too few rows to judge (%d; the slice test needs %d)", sr.Rows, minRows)
				res.Findings = append(res.Findings, Finding{Status: StatusSkip, Code: "holdout.slice-rows", Where: sr.Name,
					Message: fmt.Sprintf("slice %q: %s", sr.Name, sr.Note), Value: ptr(float64(sr.Rows)), Limit: ptr(float64(minRows))})
			case harms[i].Harm:
				st := StatusWarn
				if cfg.FailOnSlice {
					st = StatusFail
				}
				sr.Status = st
				res.Findings = append(res.Findings, Finding{Status: st, Code: "holdout.slice", Where: sr.Name,
					Message: sliceLine(sr.Name, sr.Rows, lossName, sr.Test, harms[i], cfg.Confidence),
					Value:   ptr(harms[i].Lower), Limit: ptr(margin)})
			}
		}
	}
	// A failing line names what decided: the harmed slices first, then
	// the overall numbers.
	var harmed []string
	for _, f := range res.Findings {
		if f.Code == "holdout.slice" && f.Status == StatusFail {
			harmed = append(harmed, f.Message)
		}
	}
	if len(harmed) > 0 {
		more := ""
		if len(harmed) > 1 {
			more = fmt.Sprintf(" (and %d more slice(s))", len(harmed)-1)
		}
		res.Summary = harmed[0] + more + "; overall: " + res.Summary
	}
	return det, nil
}

type rowGroup struct {
	acc  *sliceAcc
	rows []int
}

// maxHoldoutSlices bounds the values of a holdout's slice column that get
// their own results.
const maxHoldoutSlices = 64

// SegmentSliceName names the slice of rows whose slice column holds v.
func SegmentSliceName(v string) string {
	if v == "" {
		return "holdout slice (none)"
	}
	return fmt.Sprintf("holdout slice %q", v)
}

// groupRows groups a batch's rows by the slice nameOf gives each, in order
// of first appearance.
func groupRows(n int, nameOf func(i int) string, slice func(string) (*sliceAcc, error), buf []rowGroup) ([]rowGroup, error) {
	// buf's groups, past its length, keep their row lists for reuse.
	groups := buf[:0]
	lastName, last := "", -1
	for i := 0; i < n; i++ {
		name := nameOf(i)
		if name != lastName || last < 0 {
			last = -1
			for k := range groups {
				if groups[k].acc.name == name {
					last = k
					break
				}
			}
			if last < 0 {
				acc, err := slice(name)
				if err != nil {
					return nil, err
				}
				last = len(groups)
				if last < cap(groups) {
					groups = groups[:last+1]
					groups[last].acc, groups[last].rows = acc, groups[last].rows[:0]
				} else {
					groups = append(groups, rowGroup{acc: acc, rows: make([]int, 0, n)})
				}
			}
			lastName = name
		}
		groups[last].rows = append(groups[last].rows, i)
	}
	return groups, nil
}

// gather copies src at rows into *buf (reused) and returns it.
func gather(src []float32, rows []int, buf *[]float32) []float32 {
	out := (*buf)[:0]
	for _, i := range rows {
		out = append(out, src[i])
	}
	*buf = out
	return out
}

// sameInputs reports whether a holdout frame read for the candidate is
// also the baseline's: the same sparse input rules and vocabulary, and
// every dense input of the baseline present in the candidate, same size.
func sameInputs(cand, base *score.Model) bool {
	cs, bs := cand.Loaded.Spec.Inputs, base.Loaded.Spec.Inputs
	if cs.Sparse[0] != bs.Sparse[0] || len(cand.Loaded.Vocab) != len(base.Loaded.Vocab) {
		return false
	}
	for i := range cand.Loaded.Vocab {
		if cand.Loaded.Vocab[i] != base.Loaded.Vocab[i] {
			return false
		}
	}
	sizes := map[string]int{}
	for _, d := range cs.Dense {
		sizes[d.Name] = d.Size
	}
	for _, d := range bs.Dense {
		if sizes[d.Name] != d.Size {
			return false
		}
	}
	return true
}

// gather64 is gather for float64 values.
func gather64(src []float64, rows []int, buf *[]float64) []float64 {
	out := (*buf)[:0]
	for _, i := range rows {
		out = append(out, src[i])
	}
	*buf = out
	return out
}

func lossOf(m Metrics, encoder bool) float64 {
	if encoder {
		return m.Reconstruct
	}
	return m.LogLoss
}

func firstRelease(m Metrics, encoder bool, cfg HoldoutConfig, res *CheckResult) {
	check := func(name string, v float64, limit *float64, higherIsBetter bool) {
		if limit == nil {
			return
		}
		bad := v > *limit
		rel := "≤"
		if higherIsBetter {
			bad, rel = v < *limit, "≥"
		}
		f := Finding{Status: StatusPass, Code: "holdout.first-release", Where: name, Value: ptr(v), Limit: ptr(*limit),
			Message: fmt.Sprintf("%s %.5f, the policy asks %s %.5f", name, v, rel, *limit)}
		if bad {
			f.Status = StatusFail
		}
		res.Findings = append(res.Findings, f)
	}
	n := len(res.Findings)
	if encoder {
		check("reconstruction loss", m.Reconstruct, cfg.MaxReconstruction, false)
	} else {
		check("log loss", m.LogLoss, cfg.MaxLogLoss, false)
		check("normalized entropy", m.NormalizedEntropy, cfg.MaxNormalizedEntropy, false)
		check("AUC", m.AUC, cfg.MinAUC, true)
		check("ECE", m.ECE, cfg.MaxECE, false)
	}
	if len(res.Findings) == n {
		res.Findings = append(res.Findings, Finding{Status: StatusWarn, Code: "holdout.first-release",
			Message: "first release and the policy sets no absolute threshold: nothing to hold the candidate to"})
	}
}

func metricsOf(a *sliceAcc, candidate bool) Metrics {
	if a.rc != nil {
		r := a.rc
		if !candidate {
			r = a.rb
		}
		m := Metrics{Rows: r.Rows(), WeightSum: r.WeightSum()}
		if r.Rows() > 0 {
			m.BCEAll, m.BCENonzero, m.Reconstruct = finite(r.BCEAll()), finite(r.BCENonzero()), finite(r.Reconstruction())
		}
		return m
	}
	b := a.cand
	if !candidate {
		b = a.base
	}
	m := Metrics{Rows: b.Rows(), WeightSum: b.WeightSum()}
	if b.Rows() == 0 {
		return m
	}
	auc, _ := b.AUC()
	m.LogLoss, m.WeightedLogLoss = finite(a.plain.mean(candidate)), finite(b.LogLoss())
	m.NormalizedEntropy, m.AUC = finite(b.NormalizedEntropy()), finite(auc)
	m.ECE, m.MCE, m.PredictedObserved = finite(b.ECE()), finite(b.MCE()), finite(b.PredictedObserved())
	return m
}

// finiteTest keeps a test JSON-encodable: when every difference is equal
// the standard error is 0 and t is ±Inf, reported as ±MaxFloat64.
func finiteTest(t NonInferiority) NonInferiority {
	clampInf := func(v float64) float64 {
		switch {
		case math.IsInf(v, 1):
			return math.MaxFloat64
		case math.IsInf(v, -1):
			return -math.MaxFloat64
		case math.IsNaN(v):
			return 0
		}
		return v
	}
	t.T, t.P, t.Upper = clampInf(t.T), clampInf(t.P), clampInf(t.Upper)
	t.Skewness, t.MinRows = clampInf(t.Skewness), clampInf(t.MinRows)
	t.MeanDiff, t.StdErr = clampInf(t.MeanDiff), clampInf(t.StdErr)
	t.BootstrapLower, t.BootstrapUpper = clampInf(t.BootstrapLower), clampInf(t.BootstrapUpper)
	return t
}

// finite maps NaN and ±Inf (e.g. AUC of a slice with one class) to 0 so
// that the report stays valid JSON.
func finite(v float64) float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return 0
	}
	return v
}

func grow64(s []float64, n int) []float64 {
	if cap(s) < n {
		return make([]float64, n)
	}
	return s[:n]
}

// reconstruct runs an encoder's reconstruction layer over a batch and
// builds its targets. Targets: each row's sparse input after the
// duplicates rule and the transform (as the runtime does), capped at 1
// (BCE needs targets in [0, 1]). Predictions: the decoder output when its
// activation is sigmoid, else the sigmoid of it (a decoder with a linear
// output is read as giving logits).
func reconstruct(r *model.Runner, m *score.Model, b *model.Batch, q, t []float32) ([]float32, []float32, error) {
	layer := m.Net.Reconstruction()
	var err error
	if q, err = r.Run(b, layer, q); err != nil {
		return q, t, err
	}
	sigmoid := true
	for _, l := range m.Loaded.Spec.Layers {
		if l.Name == layer && l.Activation == model.ActSigmoid {
			sigmoid = false
		}
	}
	if sigmoid {
		for i, v := range q {
			q[i] = float32(1 / (1 + math.Exp(-float64(v))))
		}
	}
	width := m.Net.Width(layer)
	rows := b.Rows()
	if cap(t) < rows*width {
		t = make([]float32, rows*width)
	}
	t = t[:rows*width]
	clear(t)
	reconTargets(b, m.Loaded.Spec.Inputs.Sparse[0], width, t)
	return q, t, nil
}

// reconTargets writes each row's reconstruction targets into t (rows ×
// width, zeroed): the row's values merged by index in file order, in
// float64 (the first value of an index is 0 + v, a later one is added to
// it or, under "max", kept when larger, except at the unknown bucket),
// then the transform, capped at 1.
func reconTargets(b *model.Batch, in model.SparseInput, width int, t []float32) {
	merged, seen := make([]reconValue, max(width, in.Rows())), make([]int32, 0, 64)
	for i := 0; i < b.Rows(); i++ {
		idxs := seen[:0]
		for p := b.Indptr[i]; p < b.Indptr[i+1]; p++ {
			idx, v := b.Indices[p], float64(b.Values[p])
			if old := merged[idx]; old.seen && in.Duplicates == model.DuplicatesMax && idx != int32(in.VocabularySize) {
				merged[idx].v = math.Max(old.v, v)
			} else {
				if !old.seen {
					idxs = append(idxs, idx)
				}
				merged[idx] = reconValue{old.v + v, true}
			}
		}
		for _, idx := range idxs {
			v := merged[idx].v
			merged[idx] = reconValue{}
			switch in.Transform {
			case model.TransformLog1p:
				v = math.Log1p(v)
			case model.TransformBinary:
				if v > 0 {
					v = 1
				}
			}
			t[i*width+int(idx)] = float32(math.Min(v, 1))
		}
		seen = idxs
	}
}

// reconValue is an index's merged value in a row, while reconstruct
// merges it.
type reconValue struct {
	v    float64
	seen bool
}

// example records one encoder row's reconstruction at its nonzeros.
func example(cand, base *score.Model, fc, fb *data.Frame, i int, q, t []float32, qb []float32, wb int) ReconstructionExample {
	ex := ReconstructionExample{RowID: fc.RowIDs[i]}
	for p := fc.Indptr[i]; p < fc.Indptr[i+1]; p++ {
		idx := fc.Indices[p]
		id := "(unknown)"
		if int(idx) < cand.Vocab.Len() {
			id = cand.Vocab.ID(int(idx))
		}
		ex.Items = append(ex.Items, id)
		ex.Targets = append(ex.Targets, float64(t[idx]))
		ex.Candidate = append(ex.Candidate, float64(q[idx]))
	}
	if base != nil && wb > 0 {
		row := qb[i*wb : (i+1)*wb]
		for p := fb.Indptr[i]; p < fb.Indptr[i+1]; p++ {
			ex.Baseline = append(ex.Baseline, float64(row[fb.Indices[p]]))
		}
		if len(ex.Baseline) != len(ex.Candidate) {
			ex.Baseline = nil
		}
	}
	return ex
}
