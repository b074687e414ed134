package checks

// Statuses of a check and of a finding.
const (
	StatusPass = "PASS"
	StatusFail = "FAIL"
	StatusWarn = "WARN" // noted, does not fail the gate
	StatusSkip = "SKIP" // not run (policy says so, or nothing to compare)
)

// Verdicts of a gate report.
const (
	VerdictPass = "pass"
	VerdictFail = "fail"
)

// Names of the checks, in the order they run.
const (
	CheckIntegrity = "integrity"
	CheckFreeze    = "freeze"
	CheckContract  = "contract"
	CheckHoldout   = "holdout"
	CheckBudget    = "budget"
)

// Report is the gate report: the result of every check for one
// (candidate, baseline, holdout, policy) tuple. schemas/report.schema.json
// describes its JSON form.
type Report struct {
	SchemaVersion int      `json:"schemaVersion"`
	Tool          Tool     `json:"tool"`
	Created       string   `json:"created"` // RFC 3339, UTC
	Target        string   `json:"target"`  // NAME:TAG the candidate asks to go to
	Candidate     Subject  `json:"candidate"`
	Baseline      *Subject `json:"baseline"` // nil on a first release
	Holdout       *Subject `json:"holdout"`  // nil when the policy names none
	Policy        Policy   `json:"policy"`
	Verdict       string   `json:"verdict"`
	// Reasons lists, when the verdict is fail, one line per failing check.
	Reasons []string      `json:"reasons"`
	Checks  []CheckResult `json:"checks"`
}

// Tool names the program that wrote the report.
type Tool struct {
	Name    string `json:"name"`
	Version string `json:"version"`
}

// Subject is an artifact the report speaks about.
type Subject struct {
	Ref    string `json:"ref"`    // as given, e.g. promo-scorer:cand-better
	Digest string `json:"digest"` // manifest digest
	Kind   string `json:"kind"`
	Name   string `json:"name,omitempty"` // the spec's name
	Rows   int64  `json:"rows,omitempty"` // holdouts: row count
}

// Policy identifies the policy a report was made under.
type Policy struct {
	Name   string `json:"name"`
	Source string `json:"source"` // file name as given
	Digest string `json:"digest"` // sha256 of the policy file's bytes
}

// CheckResult is the outcome of one check.
type CheckResult struct {
	Name   string `json:"name"`
	Status string `json:"status"`
	// Summary is one line with the deciding number and its threshold.
	Summary string  `json:"summary"`
	Seconds float64 `json:"seconds"`
	// Phases splits Seconds by phase (the holdout check: read, forward,
	// statistics), when the check measures it.
	Phases   map[string]float64 `json:"phases,omitempty"`
	Findings []Finding          `json:"findings"`

	Contract *ContractDetail `json:"contract,omitempty"`
	Holdout  *HoldoutDetail  `json:"holdout,omitempty"`
	Budget   *BudgetDetail   `json:"budget,omitempty"`
}

// Finding is one thing a check found, labelled by where it is.
type Finding struct {
	Status string `json:"status"` // PASS, FAIL, WARN, or SKIP (information: not judged)
	// Code is a stable identifier, e.g. "freeze.trainable", "contract.probe".
	Code    string `json:"code"`
	Where   string `json:"where,omitempty"` // tensor, layer, probe row, slice …
	Message string `json:"message"`
	// Value and Limit are the deciding number and its threshold, when any.
	Value *float64 `json:"value,omitempty"`
	Limit *float64 `json:"limit,omitempty"`
}

// ContractDetail lists the input-contract tests and their maximum deviations.
type ContractDetail struct {
	Items []ContractItem `json:"items"`
}

// ContractItem is one contract test (probe, permutation, rotation, batch,
// duplicates, unknown, malformed).
type ContractItem struct {
	Name         string  `json:"name"`
	Status       string  `json:"status"`
	Rows         int     `json:"rows"`
	MaxDeviation float64 `json:"maxDeviation"`
	Tolerance    float64 `json:"tolerance"`
	Note         string  `json:"note,omitempty"`
}

// Metrics are the holdout metrics of one model (scorers: log loss and
// friends; encoders: reconstruction losses).
type Metrics struct {
	Rows      int64   `json:"rows"`
	WeightSum float64 `json:"weightSum"`
	// Scorers. LogLoss is the plain mean per-row log loss (what
	// scikit-learn's log_loss computes, no weights); WeightedLogLoss the
	// weighted mean the test and the other scorer metrics use (holdout
	// weights × anomalous-row weight, see HoldoutDetail.Weights).
	LogLoss           float64 `json:"logLoss,omitempty"`
	WeightedLogLoss   float64 `json:"weightedLogLoss,omitempty"`
	NormalizedEntropy float64 `json:"normalizedEntropy,omitempty"`
	AUC               float64 `json:"auc,omitempty"`
	ECE               float64 `json:"ece,omitempty"`
	MCE               float64 `json:"mce,omitempty"`
	PredictedObserved float64 `json:"predictedObserved,omitempty"`
	// Encoders: binary cross-entropy over all outputs, over nonzero
	// targets only, and their combination with the policy's alpha.
	BCEAll      float64 `json:"bceAll,omitempty"`
	BCENonzero  float64 `json:"bceNonzero,omitempty"`
	Reconstruct float64 `json:"reconstruction,omitempty"`
}

// NonInferiority is the paired test of candidate against baseline on the
// per-row loss difference d = loss(candidate) − loss(baseline):
// H0: mean(d) ≥ margin; the candidate passes when the upper one-sided
// confidence bound of mean(d) is below the margin.
type NonInferiority struct {
	Margin     float64 `json:"margin"`
	Confidence float64 `json:"confidence"`
	N          int64   `json:"n"`
	// Clusters counts the clusters (listeners) whose rows were summed
	// together for a cluster-robust test; 0 when rows are not clustered.
	Clusters int64   `json:"clusters,omitempty"`
	MeanDiff float64 `json:"meanDiff"`
	StdErr   float64 `json:"stdErr"`
	T        float64 `json:"t"`
	DF       float64 `json:"df"`
	P        float64 `json:"p"`     // one-sided p-value of H0
	Upper    float64 `json:"upper"` // upper one-sided bound (t)
	// Skewness of the differences (of the cluster totals when clustered)
	// and MinRows = 25·max(Skewness, 0)², the rows (clusters) the t bound
	// needs to be trusted (Cochran's rule); the test passes when Upper <
	// Margin and DF + 1 > MinRows.
	Skewness float64 `json:"skewness"`
	MinRows  float64 `json:"minRows"`
	// Poisson-bootstrap percentile interval of mean(d).
	BootstrapLower    float64 `json:"bootstrapLower"`
	BootstrapUpper    float64 `json:"bootstrapUpper"`
	BootstrapReplicas int     `json:"bootstrapReplicas"`
	Pass              bool    `json:"pass"`
}

// SliceResult is the holdout comparison restricted to one slice of rows.
type SliceResult struct {
	Name      string          `json:"name"`
	Rows      int64           `json:"rows"`
	Candidate Metrics         `json:"candidate"`
	Baseline  *Metrics        `json:"baseline,omitempty"`
	Test      *NonInferiority `json:"test,omitempty"`
	// Harm is the test that decides a slice: evidence that the candidate
	// is worse than the slice margin, Holm-corrected across slices (nil:
	// not judged).
	Harm   *SliceHarm `json:"harm,omitempty"`
	Status string     `json:"status"`
	// Note says why a slice was not judged ("too few rows to judge").
	Note string `json:"note,omitempty"`
}

// CalibrationBin is one bin of a reliability diagram.
type CalibrationBin struct {
	Lower     float64 `json:"lower"`
	Upper     float64 `json:"upper"`
	Count     float64 `json:"count"` // weight in the bin
	Predicted float64 `json:"predicted"`
	Observed  float64 `json:"observed"`
}

// Histogram has equal-width bins over [Min, Max].
type Histogram struct {
	Min    float64   `json:"min"`
	Max    float64   `json:"max"`
	Counts []float64 `json:"counts"`
}

// ReconstructionExample is one holdout row with its reconstruction at the
// row's nonzero positions (encoders).
type ReconstructionExample struct {
	RowID     int64     `json:"rowId"`
	Items     []string  `json:"items"`
	Targets   []float64 `json:"targets"`
	Candidate []float64 `json:"candidate"`
	Baseline  []float64 `json:"baseline,omitempty"`
}

// HoldoutDetail is the holdout check's numbers and the data for its plots.
type HoldoutDetail struct {
	Kind string `json:"kind"` // scorer or encoder
	// Weights says where the rows' slices and weights came from.
	Weights   *RowWeights     `json:"weights,omitempty"`
	Candidate Metrics         `json:"candidate"`
	Baseline  *Metrics        `json:"baseline,omitempty"`
	Test      *NonInferiority `json:"test,omitempty"`
	Slices    []SliceResult   `json:"slices"`
	// Calibration curves (scorers).
	CalibrationCandidate []CalibrationBin `json:"calibrationCandidate,omitempty"`
	CalibrationBaseline  []CalibrationBin `json:"calibrationBaseline,omitempty"`
	// LossDiff is the distribution of per-row loss differences.
	LossDiff *Histogram              `json:"lossDiff,omitempty"`
	Examples []ReconstructionExample `json:"examples,omitempty"`
}

// BudgetDetail lists the budget items.
type BudgetDetail struct {
	Items []BudgetItem `json:"items"`
	// Latency says how the latency items were measured (nil: not measured).
	Latency *LatencyDetail `json:"latency,omitempty"`
}

// BudgetItem is one budgeted quantity against its limit.
type BudgetItem struct {
	Name     string   `json:"name"` // bytes, params, growth, load-memory, latency-p50, latency-p99, latency-ratio
	Unit     string   `json:"unit"`
	Value    float64  `json:"value"`
	Limit    *float64 `json:"limit,omitempty"`
	Baseline *float64 `json:"baseline,omitempty"`
	Status   string   `json:"status"`
}

// StatusMark is a symbol for a check or finding status, so that a status
// reads without colour (reports and the web view use it).
func StatusMark(s string) string {
	switch s {
	case StatusPass:
		return "✓"
	case StatusFail:
		return "✗"
	case StatusWarn:
		return "!"
	case StatusSkip:
		return "–"
	}
	return "?"
}
