// Package reporttest builds gate reports with every field filled, for tests
// of the renderings and of the report schema. The numbers are made up but
// consistent with each other (bins, histograms and slices agree with the
// metrics they sit beside); the setting is the demo's fictional podcast
// network.
package reporttest

import (
	"math"
	"math/rand/v2"

	"github.com/modelgate/modelgate/internal/checks"
)

// Digests used by the sample reports: 64 hex digits each.
const (
	CandidateDigest = "sha256:1111111111111111111111111111111111111111111111111111111111111111"
	BaselineDigest  = "sha256:2222222222222222222222222222222222222222222222222222222222222222"
	HoldoutDigest   = "sha256:3333333333333333333333333333333333333333333333333333333333333333"
	PolicyDigest    = "sha256:4444444444444444444444444444444444444444444444444444444444444444"
	EncoderDigest   = "sha256:5555555555555555555555555555555555555555555555555555555555555555"
)

func f(v float64) *float64 { return &v }

// Scorer returns a passing gate report for a scorer candidate against a
// baseline, with every check run and every detail filled: contract items,
// holdout metrics, the non-inferiority test, slices, both calibration
// curves, the loss-difference histogram and budget items.
func Scorer() *checks.Report {
	rng := rand.New(rand.NewPCG(7, 11))
	r := &checks.Report{
		SchemaVersion: 1,
		Tool:          checks.Tool{Name: "modelgate", Version: "0.1.0-test"},
		Created:       "2026-03-14T09:26:53Z",
		Target:        "promo-scorer:prod",
		Candidate: checks.Subject{Ref: "promo-scorer:cand-better", Digest: CandidateDigest,
			Kind: "scorer", Name: "promo-scorer"},
		Baseline: &checks.Subject{Ref: "promo-scorer:prod", Digest: BaselineDigest,
			Kind: "scorer", Name: "promo-scorer"},
		Holdout: &checks.Subject{Ref: "listeners-holdout:2026-03", Digest: HoldoutDigest,
			Kind: "holdout", Name: "listeners-holdout", Rows: 200000},
		Policy:  checks.Policy{Name: "promo-scorer-prod", Source: "policies/promo-scorer.yaml", Digest: PolicyDigest},
		Verdict: checks.VerdictPass,
		Reasons: []string{},
	}
	r.Checks = []checks.CheckResult{
		{
			Name: checks.CheckIntegrity, Status: checks.StatusPass, Seconds: 0.42,
			Summary: "7 blobs re-hashed, 0 mismatches; spec valid; no NaN/Inf",
			Findings: []checks.Finding{
				{Status: checks.StatusPass, Code: "integrity.blobs", Where: "manifest", Message: "7 of 7 blobs match their digests", Value: f(0), Limit: f(0)},
				{Status: checks.StatusPass, Code: "integrity.encoder", Where: "encoder " + EncoderDigest, Message: "referenced encoder present"},
			},
		},
		{
			Name: checks.CheckFreeze, Status: checks.StatusPass, Seconds: 0.05,
			Summary: "encoder part frozen: 0 trainable tensors, 0 optimizer slots, 0 regularisers",
			Findings: []checks.Finding{
				{Status: checks.StatusPass, Code: "freeze.digest", Where: "encoder/emb", Message: "encoder bytes identical to listener-encoder@" + EncoderDigest[:19]},
			},
		},
		{
			Name: checks.CheckContract, Status: checks.StatusWarn, Seconds: 1.8,
			Summary: "max deviation 3.1e-07 ≤ tolerance 1e-05 over 6 tests; 1 weak probe",
			Findings: []checks.Finding{
				{Status: checks.StatusWarn, Code: "contract.weak-probe", Where: "probe row 4", Message: "row has one distinct value: rotation cannot reveal a misalignment"},
				{Status: checks.StatusPass, Code: "contract.probe", Where: "probe rows", Message: "32 probe rows reproduce the recorded outputs", Value: f(3.1e-7), Limit: f(1e-5)},
			},
			Contract: &checks.ContractDetail{Items: []checks.ContractItem{
				{Name: "probe", Status: checks.StatusPass, Rows: 32, MaxDeviation: 3.1e-7, Tolerance: 1e-5},
				{Name: "permutation", Status: checks.StatusPass, Rows: 32, MaxDeviation: 1.2e-7, Tolerance: 1e-6},
				{Name: "rotation", Status: checks.StatusWarn, Rows: 31, MaxDeviation: 0.084, Tolerance: 1e-6, Note: "1 row with a single distinct value"},
				{Name: "batch", Status: checks.StatusPass, Rows: 32, MaxDeviation: 0, Tolerance: 1e-6},
				{Name: "duplicates", Status: checks.StatusPass, Rows: 8, MaxDeviation: 5.9e-8, Tolerance: 1e-6},
				{Name: "malformed", Status: checks.StatusPass, Rows: 12, MaxDeviation: 0, Tolerance: 0, Note: "12 of 12 malformed rows refused"},
			}},
		},
		{
			Name: checks.CheckHoldout, Status: checks.StatusPass, Seconds: 12.6,
			Summary: "upper 95% bound of mean loss difference -0.0021 < margin 0.002",
			Findings: []checks.Finding{
				{Status: checks.StatusPass, Code: "holdout.noninferiority", Where: "all rows", Message: "candidate not worse than baseline", Value: f(-0.0021), Limit: f(0.002)},
				{Status: checks.StatusWarn, Code: "holdout.anomalous", Where: "slice nnz>p99", Message: "412 anomalous rows down-weighted by 0.25"},
			},
			Holdout: scorerHoldout(rng),
		},
		{
			Name: checks.CheckBudget, Status: checks.StatusPass, Seconds: 4.1,
			Summary: "latency p99 6.8 ms ≤ 10 ms; 3.4 MiB ≤ 8 MiB",
			Findings: []checks.Finding{
				{Status: checks.StatusPass, Code: "budget.latency-p99", Where: "200 candidates, 1 thread", Message: "p99 within budget", Value: f(6.8), Limit: f(10)},
			},
			Budget: &checks.BudgetDetail{Items: []checks.BudgetItem{
				{Name: "bytes", Unit: "bytes", Value: 3565158, Limit: f(8388608), Baseline: f(3411000), Status: checks.StatusPass},
				{Name: "params", Unit: "params", Value: 880000, Limit: f(2000000), Baseline: f(842000), Status: checks.StatusPass},
				{Name: "growth", Unit: "ratio", Value: 1.045, Limit: f(1.25), Status: checks.StatusPass},
				{Name: "load-memory", Unit: "bytes", Value: 14680064, Limit: f(67108864), Baseline: f(13900000), Status: checks.StatusPass},
				{Name: "latency-p50", Unit: "ms", Value: 4.2, Limit: f(6), Baseline: f(4.4), Status: checks.StatusPass},
				{Name: "latency-p99", Unit: "ms", Value: 6.8, Limit: f(10), Baseline: f(7.1), Status: checks.StatusPass},
			}},
		},
	}
	return r
}

func scorerHoldout(rng *rand.Rand) *checks.HoldoutDetail {
	cand := checks.Metrics{Rows: 200000, WeightSum: 199897, LogLoss: 0.2431, NormalizedEntropy: 0.8712,
		AUC: 0.7815, ECE: 0.0062, MCE: 0.031, PredictedObserved: 1.012}
	base := checks.Metrics{Rows: 200000, WeightSum: 199897, LogLoss: 0.2452, NormalizedEntropy: 0.8787,
		AUC: 0.7741, ECE: 0.0115, MCE: 0.052, PredictedObserved: 0.963}
	test := &checks.NonInferiority{Margin: 0.002, Confidence: 0.95, N: 200000, MeanDiff: -0.0021,
		StdErr: 0.00031, T: -13.2, DF: 199999, P: 1e-12, Upper: -0.00159,
		BootstrapLower: -0.00262, BootstrapUpper: -0.00158, BootstrapReplicas: 200, Pass: true}
	h := &checks.HoldoutDetail{
		Kind: "scorer", Candidate: cand, Baseline: &base, Test: test,
		LossDiff:             lossHistogram(rng, -0.0021, 0.14, 41),
		CalibrationCandidate: calibration(rng, 0.0),
		CalibrationBaseline:  calibration(rng, 0.06),
	}
	names := []string{"nnz 1–3", "nnz 4–12", "nnz 13–40", "nnz 41–120", "nnz>p99 (anomalous)"}
	rows := []int64{61000, 72000, 44000, 22588, 412}
	for i, n := range names {
		c := cand
		c.Rows, c.WeightSum = rows[i], float64(rows[i])
		c.LogLoss = 0.29 - 0.025*float64(i) + 0.004*rng.Float64()
		b := base
		b.Rows, b.WeightSum = rows[i], float64(rows[i])
		b.LogLoss = c.LogLoss + 0.0021 - 0.002*rng.Float64()
		t := *test
		t.N = rows[i]
		t.MeanDiff = c.LogLoss - b.LogLoss
		t.StdErr = 0.0009 * math.Sqrt(200000/float64(rows[i]))
		t.Upper = t.MeanDiff + 1.645*t.StdErr
		t.Pass = t.Upper < t.Margin
		st := checks.StatusPass
		if !t.Pass {
			st = checks.StatusWarn
		}
		h.Slices = append(h.Slices, checks.SliceResult{Name: n, Rows: rows[i], Candidate: c, Baseline: &b, Test: &t, Status: st})
	}
	return h
}

// calibration makes ten reliability bins; skew pushes the observed rate
// away from the predicted one.
func calibration(rng *rand.Rand, skew float64) []checks.CalibrationBin {
	var bins []checks.CalibrationBin
	for i := range 10 {
		lo, hi := float64(i)/10, float64(i+1)/10
		pred := lo + (0.3+0.4*rng.Float64())*(hi-lo)
		obs := math.Min(1, math.Max(0, pred+skew*pred*(1-pred)*4*(rng.Float64()-0.2)+0.01*(rng.Float64()-0.5)))
		bins = append(bins, checks.CalibrationBin{Lower: lo, Upper: hi,
			Count: math.Round(90000 * math.Exp(-3*lo)), Predicted: pred, Observed: obs})
	}
	return bins
}

// lossHistogram bins n normal-looking counts around mean with the given
// spread; deterministic for a given rng.
func lossHistogram(rng *rand.Rand, mean, spread float64, n int) *checks.Histogram {
	h := &checks.Histogram{Min: mean - 3*spread, Max: mean + 3*spread, Counts: make([]float64, n)}
	for range 25000 {
		v := mean + spread*rng.NormFloat64()
		k := int((v - h.Min) / (h.Max - h.Min) * float64(n))
		if k >= 0 && k < n {
			h.Counts[k]++
		}
	}
	return h
}

// Failing returns a scorer report whose contract and holdout checks fail:
// the vocabulary order no longer matches the weight rows, and the
// candidate loses log loss beyond the margin.
func Failing() *checks.Report {
	r := Scorer()
	r.Candidate.Ref = "promo-scorer:cand-shuffled"
	r.Verdict = checks.VerdictFail
	r.Reasons = []string{
		"contract: probe rows deviate by 0.031 > tolerance 1e-05",
		"holdout: upper 95% bound of mean loss difference 0.0113 ≥ margin 0.002",
	}
	c := &r.Checks[2]
	c.Status = checks.StatusFail
	c.Summary = "probe max deviation 0.031 > tolerance 1e-05"
	c.Findings = append(c.Findings,
		checks.Finding{Status: checks.StatusFail, Code: "contract.probe", Where: "probe row 3", Message: "output 0.412 differs from the recorded 0.381", Value: f(0.031), Limit: f(1e-5)},
		checks.Finding{Status: checks.StatusFail, Code: "contract.probe", Where: "probe row 17", Message: "output 0.090 differs from the recorded 0.104", Value: f(0.014), Limit: f(1e-5)},
	)
	c.Contract.Items[0].Status = checks.StatusFail
	c.Contract.Items[0].MaxDeviation = 0.031
	h := &r.Checks[3]
	h.Status = checks.StatusFail
	h.Summary = "upper 95% bound of mean loss difference 0.0113 ≥ margin 0.002"
	h.Findings[0] = checks.Finding{Status: checks.StatusFail, Code: "holdout.noninferiority", Where: "all rows",
		Message: "candidate worse than baseline beyond the margin", Value: f(0.0113), Limit: f(0.002)}
	t := h.Holdout.Test
	t.MeanDiff, t.Upper, t.P, t.T, t.Pass = 0.0108, 0.0113, 1, 28.4, false
	t.BootstrapLower, t.BootstrapUpper = 0.0103, 0.0114
	h.Holdout.Candidate.LogLoss = 0.2560
	h.Holdout.LossDiff = lossHistogram(rand.New(rand.NewPCG(3, 5)), 0.0108, 0.15, 41)
	return r
}

// FirstRelease returns a passing scorer report with no baseline: no
// baseline metrics, curves, test or histogram, and only the candidate's
// calibration curve.
func FirstRelease() *checks.Report {
	r := Scorer()
	r.Baseline = nil
	h := r.Checks[3].Holdout
	h.Baseline, h.Test, h.CalibrationBaseline, h.LossDiff = nil, nil, nil, nil
	for i := range h.Slices {
		h.Slices[i].Baseline, h.Slices[i].Test = nil, nil
	}
	r.Checks[3].Summary = "log loss 0.2431 ≤ absolute threshold 0.30 (first release)"
	for i := range r.Checks[4].Budget.Items {
		r.Checks[4].Budget.Items[i].Baseline = nil
	}
	return r
}

// Encoder returns a passing encoder report with reconstruction metrics and
// n reconstruction examples.
func Encoder(n int) *checks.Report {
	rng := rand.New(rand.NewPCG(13, 17))
	r := Scorer()
	r.Target = "listener-encoder:prod"
	r.Candidate = checks.Subject{Ref: "listener-encoder:cand-2026-03", Digest: CandidateDigest, Kind: "encoder", Name: "listener-encoder"}
	r.Baseline = &checks.Subject{Ref: "listener-encoder:prod", Digest: BaselineDigest, Kind: "encoder", Name: "listener-encoder"}
	r.Policy = checks.Policy{Name: "listener-encoder-prod", Source: "policies/listener-encoder.yaml", Digest: PolicyDigest}
	r.Checks[1] = checks.CheckResult{Name: checks.CheckFreeze, Status: checks.StatusSkip, Summary: "encoders have no frozen part", Findings: []checks.Finding{}}
	cand := checks.Metrics{Rows: 50000, WeightSum: 49210.5, BCEAll: 0.0213, BCENonzero: 0.412, Reconstruct: 0.1156}
	base := checks.Metrics{Rows: 50000, WeightSum: 49210.5, BCEAll: 0.0219, BCENonzero: 0.431, Reconstruct: 0.1206}
	test := &checks.NonInferiority{Margin: 0.001, Confidence: 0.95, N: 50000, MeanDiff: -0.0050, StdErr: 0.0004,
		T: -12.5, DF: 49999, P: 1e-10, Upper: -0.0043, BootstrapLower: -0.0058, BootstrapUpper: -0.0042, BootstrapReplicas: 200, Pass: true}
	h := &checks.HoldoutDetail{Kind: "encoder", Candidate: cand, Baseline: &base, Test: test,
		LossDiff: lossHistogram(rng, -0.005, 0.03, 31)}
	for i, name := range []string{"nnz 1–5", "nnz 6–30", "nnz>30"} {
		c, b := cand, base
		c.Reconstruct = 0.09 + 0.02*float64(i) + 0.005*rng.Float64()
		b.Reconstruct = c.Reconstruct + 0.004*rng.Float64()
		h.Slices = append(h.Slices, checks.SliceResult{Name: name, Rows: 16000, Candidate: c, Baseline: &b, Status: checks.StatusPass})
	}
	shows := []string{"show:night-owls", "show:true-crime-weekly", "show:garden-hour", "show:chess-talk",
		"show:deep-space", "show:bread-and-butter", "show:jazz-notes", "show:city-walks", "show:the-long-run"}
	for e := range n {
		k := 3 + e%5
		ex := checks.ReconstructionExample{RowID: int64(1000 + 37*e)}
		for j := range k {
			ex.Items = append(ex.Items, shows[(e+2*j)%len(shows)])
			ex.Targets = append(ex.Targets, 1)
			ex.Candidate = append(ex.Candidate, 0.45+0.5*rng.Float64())
			ex.Baseline = append(ex.Baseline, 0.3+0.5*rng.Float64())
		}
		h.Examples = append(h.Examples, ex)
	}
	r.Checks[3] = checks.CheckResult{Name: checks.CheckHoldout, Status: checks.StatusPass, Seconds: 3.3,
		Summary:  "upper 95% bound of mean reconstruction-loss difference -0.0043 < margin 0.001",
		Findings: []checks.Finding{{Status: checks.StatusPass, Code: "holdout.noninferiority", Where: "all rows", Message: "candidate not worse than baseline", Value: f(-0.0043), Limit: f(0.001)}},
		Holdout:  h}
	return r
}

// Hostile returns a failing report whose names and messages carry markup
// and terminal control sequences, as a hostile artifact could.
func Hostile() *checks.Report {
	r := Failing()
	evil := `<script>alert("x")</script>`
	r.Candidate.Ref = "promo-scorer:" + evil
	r.Candidate.Name = evil
	r.Policy.Source = "policies/\x1b[2J" + evil + ".yaml"
	r.Reasons = append(r.Reasons, "contract: "+evil)
	r.Checks[2].Findings = append(r.Checks[2].Findings, checks.Finding{
		Status: checks.StatusFail, Code: "contract.probe", Where: "probe " + evil, Message: "\x1b]0;owned\x07" + evil + " & more"})
	h := r.Checks[3].Holdout
	h.Slices[0].Name = evil
	r.Checks[4].Budget.Items[0].Name = evil
	return r
}
