// Package policy reads modelgate policies: per target tag, which gate
// checks run and their thresholds, the holdout, the size and latency
// budget, and who must approve a promotion.
//
// A policy file is YAML or JSON and must validate against
// schemas/policy.schema.json; Parse then applies the rules a schema cannot
// express (references, duplicate targets, keys) and fills in every default
// the schema documents, so a caller reads thresholds straight from the
// structs. A policy's identity is its canonical form (Canonical): the
// document as JSON with sorted keys, numbers written as RFC 8785 writes
// them, and every keyFile replaced by the key it names, so that the form
// is self-contained and its digest covers the keys. Digest is its sha256,
// recorded in every gate report, approval and release record; the
// canonical bytes are what a tag's release log binds (package release).
package policy

import (
	"crypto/ed25519"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"io"
	"math"
	"os"
	"path"
	"strings"
	"time"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// MaxFileBytes bounds the size of a policy file.
const MaxFileBytes = 1 << 20

// Kinds of model a rule admits (the spec's kind values).
const (
	KindEncoder = "encoder"
	KindScorer  = "scorer"
)

// Names of the checks, as Rule.Enabled takes them (the same strings as the
// gate's check names).
const (
	CheckIntegrity = "integrity"
	CheckFreeze    = "freeze"
	CheckContract  = "contract"
	CheckHoldout   = "holdout"
	CheckBudget    = "budget"
)

// Policy is a parsed, validated policy with every default applied. It is
// read-only once returned.
type Policy struct {
	// Name is the policy's name (its "name" property).
	Name string
	// Description is its free text, "" when none.
	Description string
	// Source is the file name given to Load or Parse.
	Source string
	// Rules are the policy's rules in file order, one per target tag.
	Rules []Rule
	// Retention says what the store collector may remove; nil when the
	// policy has no retention section (then nothing is eligible).
	Retention *Retention

	digest     string
	fileDigest string
	canonical  []byte
}

// Digest returns "sha256:<64 hex>" of the policy's canonical form:
// comments, spacing, key order and whether a key is given inline or by
// file do not count; every setting and every key does.
func (p *Policy) Digest() string { return p.digest }

// FileDigest returns "sha256:<64 hex>" of the exact bytes the policy was
// parsed from: the identity modelgate recorded before policies were bound
// to tags.
func (p *Policy) FileDigest() string { return p.fileDigest }

// Canonical returns a copy of the policy's canonical form: a JSON document
// that Parse reads back to the same rules and the same Digest.
func (p *Policy) Canonical() []byte { return append([]byte(nil), p.canonical...) }

// Targets returns the policy's target tags (NAME:TAG) in file order.
func (p *Policy) Targets() []string {
	out := make([]string, len(p.Rules))
	for i := range p.Rules {
		out[i] = p.Rules[i].Target.String()
	}
	return out
}

// Rule returns the rule for target, a NAME:TAG reference. A malformed
// target, a target with a digest, or one the policy does not cover is an
// errkind.BadInput error; the last lists the targets the policy covers.
func (p *Policy) Rule(target string) (*Rule, error) {
	ref, err := registry.ParseRef(target, false)
	if err != nil {
		return nil, err
	}
	if ref.Tag == "" || ref.HasDigest() {
		return nil, errkind.New(errkind.BadInput, "target %q: want a tag NAME:TAG, without a digest", target)
	}
	for i := range p.Rules {
		t := p.Rules[i].Target
		if t.Repository == ref.Repository && t.Tag == ref.Tag {
			return &p.Rules[i], nil
		}
	}
	return nil, errkind.New(errkind.BadInput, "policy %s has no rule for target %q; it covers: %s",
		p.Source, target, strings.Join(p.Targets(), ", "))
}

// Rule is what a policy demands of a candidate for one target tag.
type Rule struct {
	// Target is the tag the rule guards (Tag set, no digest).
	Target registry.Ref
	// Kind is KindEncoder or KindScorer: what may go to Target.
	Kind string
	// HoldoutRef is the holdout artifact (a tag, resolved to a digest when
	// the gate runs, or a digest); nil when the policy names none, which it
	// may only do when the holdout check is disabled.
	HoldoutRef *registry.Ref

	// Integrity, Freeze, Contract, Holdout and Budget configure the five
	// checks, defaults applied.
	Integrity IntegrityCheck
	Freeze    FreezeCheck
	Contract  ContractCheck
	Holdout   HoldoutCheck
	Budget    BudgetCheck
	// Approvals is what promote demands besides a passing gate report.
	Approvals Approvals
	// Releasers are who may move the target.
	Releasers Releasers
}

// Releasers are the keys that may sign a move of a target. An empty list
// admits anyone, signed or not.
type Releasers struct {
	// Promote may sign promotions and changes of the tag's bound policy.
	Promote []Key
	// Rollback may sign rollbacks.
	Rollback []Key
}

// Enabled reports whether the named check (CheckIntegrity … CheckBudget)
// runs under this rule. Integrity always runs; an unknown name gives false.
func (r *Rule) Enabled(check string) bool {
	switch check {
	case CheckIntegrity:
		return true
	case CheckFreeze:
		return r.Freeze.Enabled
	case CheckContract:
		return r.Contract.Enabled
	case CheckHoldout:
		return r.Holdout.Enabled
	case CheckBudget:
		return r.Budget.Enabled
	}
	return false
}

// IntegrityCheck configures the integrity check, which cannot be disabled.
type IntegrityCheck struct {
	// Enabled is always true.
	Enabled bool
}

// FreezeCheck configures the freeze check.
type FreezeCheck struct {
	// Enabled: whether the check runs. Default true.
	Enabled bool
	// RequireFrozen (scorers): the encoder must be embedded as constants;
	// when false an encoder referenced by digest is acceptable too.
	// Default false. Always false for encoders.
	RequireFrozen bool
	// EncoderTag (scorers), when not nil, is an encoder tag whose current
	// target the scorer's encoder must be. Always nil for encoders.
	EncoderTag *registry.Ref
}

// Tolerance bounds the deviation of an output from its reference:
// |got − want| ≤ Abs + Rel·|want|.
type Tolerance struct {
	// Abs is the absolute part, in output units (≥ 0).
	Abs float64
	// Rel is the relative part, a fraction of |want| (≥ 0).
	Rel float64
}

// Limit returns the largest |got − want| the tolerance allows for want.
func (t Tolerance) Limit(want float64) float64 { return t.Abs + t.Rel*math.Abs(want) }

// Allows reports whether got is within the tolerance of want. Equal values
// (including equal infinities) are always allowed; a NaN never is.
func (t Tolerance) Allows(got, want float64) bool {
	if got == want {
		return true
	}
	return math.Abs(got-want) <= t.Limit(want) // false when either is NaN
}

// ContractCheck configures the input-contract check.
type ContractCheck struct {
	// Enabled: whether the check runs. Default true.
	Enabled bool
	// ProbeTolerance: stored probe outputs against the runtime's.
	// Default {Abs: 1e-5, Rel: 1e-4}.
	ProbeTolerance Tolerance
	// BatchTolerance is the largest absolute difference, in output units,
	// between a row scored alone and inside a batch. Default 0
	// (bit-identical).
	BatchTolerance float64
	// PermutationTolerance: outputs of a row against the same row with its
	// (index, value) pairs permuted. Default {Abs: 0, Rel: 0}
	// (bit-identical, as the reference runtime promises).
	PermutationTolerance Tolerance
	// RequireDistinctValuesProbes: too few rows with two or more distinct
	// values fails the check instead of warning. Default false.
	RequireDistinctValuesProbes bool
	// ExtraRows are the random rows generated besides the stored probes.
	ExtraRows ExtraRows
}

// ExtraRows says how many random rows the contract check generates.
type ExtraRows struct {
	// Count is the number of rows (0: stored probes only). Default 256.
	Count int
	// Seed seeds their generation. Default 1.
	Seed uint64
}

// HoldoutCheck configures the holdout check. Margin, Confidence,
// BootstrapReplicas and Seed apply to both kinds; Slices and the
// first-release scorer thresholds to scorers only (zero for encoders);
// Alpha, WeightQuantile, WeightPower and MaxReconstructionLoss to encoders
// only (zero for scorers).
type HoldoutCheck struct {
	// Enabled: whether the check runs. Default true.
	Enabled bool
	// Margin is the non-inferiority margin on the (weighted) mean per-row
	// loss difference candidate − baseline, in nats (≥ 0). Default 0.001.
	Margin float64
	// Confidence is the level of the one-sided upper bound, in (0, 1).
	// Default 0.95.
	Confidence float64
	// BootstrapReplicas is the number of Poisson-bootstrap replicates.
	// Default 1000.
	BootstrapReplicas int
	// Seed seeds the bootstrap. Default 1.
	Seed uint64
	// ClusterColumn names the holdout column whose value groups rows that
	// are not independent (a listener's rows): the test is then
	// cluster-robust and the bootstrap resamples clusters. "" (the
	// default) uses the column the holdout declared when it was pushed,
	// if any.
	ClusterColumn string

	// Slices (scorers) buckets rows by nonzero count.
	Slices Slices
	// MaxLogLoss (scorers, first release), in nats; nil: not checked.
	MaxLogLoss *float64
	// MaxNormalizedEntropy (scorers, first release), a ratio; default 1.
	MaxNormalizedEntropy *float64
	// MinAUC (scorers, first release), in [0, 1]; default 0.5.
	MinAUC *float64
	// MaxECE (scorers, first release), a probability; nil: not checked.
	MaxECE *float64
	// Tail (scorers) is the label-free rule on confident mistakes.
	Tail Tail

	// Alpha (encoders) weighs the BCE over nonzero targets (the observed
	// entries) against the BCE over all outputs: loss = Alpha·BCEnonzero +
	// (1 − Alpha)·BCEall, a confidence weighting of observed against
	// unobserved entries (Hu, Koren, Volinsky, "Collaborative Filtering for
	// Implicit Feedback Datasets", ICDM 2008); Alpha = 1 is the loss over
	// observed entries only (Sedhain, Menon, Sanner, Xie, "AutoRec:
	// Autoencoders Meet Collaborative Filtering", WWW 2015). Default 0.5.
	Alpha float64
	// WeightQuantile (encoders) is the training quantile of nonzeros per
	// row above which rows are down-weighted (see RowWeight). Default 0.99.
	WeightQuantile float64
	// WeightPower (encoders) is the exponent of the down-weighting; 0 turns
	// it off. Default 1.
	WeightPower float64
	// MaxReconstructionLoss (encoders, first release), in nats; nil: not
	// checked.
	MaxReconstructionLoss *float64
}

// RowWeight is the encoder down-weighting rule: a row with n nonzeros
// weighs 1 when n ≤ t and (t/n)^WeightPower when n > t, where t is the
// model's training quantile WeightQuantile of nonzeros per row (t below 1
// counts as 1). The result is in (0, 1]. With WeightPower 1 it is Huber's
// weight min(1, t/n) (Huber, "Robust Estimation of a Location Parameter",
// Ann. Math. Statist. 35(1), 1964) with the threshold at a quantile, as in
// winsorising; as WeightPower grows it approaches trimming the rows above t.
func (h HoldoutCheck) RowWeight(n int, t float64) float64 {
	if t < 1 || math.IsNaN(t) {
		t = 1
	}
	if float64(n) <= t || h.WeightPower == 0 {
		return 1
	}
	return math.Pow(t/float64(n), h.WeightPower)
}

// Slices configures the per-slice holdout tests of a scorer.
type Slices struct {
	// NonzeroQuantiles are the cut points, as training quantiles of
	// nonzeros per row, strictly increasing, each below AnomalyQuantile.
	// Default [0.5, 0.9].
	NonzeroQuantiles []float64
	// AnomalyQuantile: rows above this training quantile are anomalous,
	// reported as their own slice. Default 0.99.
	AnomalyQuantile float64
	// AnomalyWeight is an anomalous row's weight in the overall test, in
	// [0, 1]. Default 0.25.
	AnomalyWeight float64
	// PerSliceMargin is each slice's margin, in nats. Default: Margin.
	PerSliceMargin float64
	// MinRows: a slice with fewer rows is reported as "too few rows to
	// judge", not tested. Default 100.
	MinRows int
	// FailOnSlice: a harmed slice fails the check instead of warning.
	// Default false.
	FailOnSlice bool
}

// Tail configures the label-free rule on confident mistakes: rows where
// the candidate's loss, were the label the outcome it bets hardest
// against, exceeds the baseline's by more than Excess nats are flagged,
// and when the flagged rows' exposure (their expected extra loss were the
// baseline right on them, averaged over the holdout) reaches the margin,
// Action applies.
type Tail struct {
	// Excess is the flagging threshold in nats (> 0). Default 5.
	Excess float64
	// Action is TailFail, TailWarn or TailOff. Default TailFail.
	Action string
}

// Tail actions.
const (
	TailFail = "fail"
	TailWarn = "warn"
	TailOff  = "off"
)

// BudgetCheck configures the budget check. A nil limit is measured and
// reported but not enforced.
type BudgetCheck struct {
	// Enabled: whether the check runs. Default true.
	Enabled bool
	// MaxBytes is the largest artifact size, in bytes.
	MaxBytes *int64
	// MaxParams is the largest parameter count.
	MaxParams *int64
	// MaxGrowth is the largest growth of bytes and of parameters over the
	// baseline, a fraction (0.2 = 20%). Default 0.2.
	MaxGrowth float64
	// MaxLoadBytes is the largest number of bytes allocated to load and
	// prepare the model for serving.
	MaxLoadBytes *int64
	// Latency, when not nil, asks for latency to be measured.
	Latency *LatencyBudget
}

// LatencyBudget configures the single-thread latency measurement.
type LatencyBudget struct {
	// Candidates is the number of rows per request. Default 200 (the demo
	// network's candidate shows per request, a figure of our scenario).
	Candidates int
	// Runs is the number of timed requests per model (candidate and
	// baseline each), split evenly into Blocks. Default 200.
	Runs int
	// Blocks is how many blocks the runs are split into; blocks alternate
	// candidate and baseline, and each figure is the median over blocks.
	// Default 5; at most Runs.
	Blocks int
	// P50Ms is the largest median latency, in milliseconds; nil: not
	// enforced.
	P50Ms *float64
	// P99Ms is the largest 99th-percentile latency, in milliseconds; nil:
	// not enforced.
	P99Ms *float64
	// MaxRatio is the largest ratio of the candidate's median request time
	// to the baseline's, measured interleaved in the same process; nil:
	// not enforced. Not applied on a first release.
	MaxRatio *float64
}

// Approvals is what promote demands besides a passing gate report.
type Approvals struct {
	// Required is how many distinct Approvers must approve (m of n);
	// 0 ≤ Required ≤ len(Approvers). Default 0.
	Required int
	// Approvers are the people whose approvals count, distinct by name,
	// key id and key.
	Approvers []Key
	// AllowSelfApproval lets the candidate's pusher approve it. Default
	// false.
	AllowSelfApproval bool
	// MaxAge is the oldest approval that still counts (> 0). Default 72h.
	MaxAge time.Duration
	// ReportSigners are the keys whose signed gate reports promote trusts.
	ReportSigners []Key
}

// Key is a named, parsed ed25519 public key.
type Key struct {
	// Name is who holds the key.
	Name string
	// KeyID is the key id as written in the policy, "" when not given.
	KeyID string
	// KeyFile is the key file as written (relative to the policy file),
	// "" when the key was given inline.
	KeyFile string
	// PublicKey is the parsed key.
	PublicKey ed25519.PublicKey
}

// Problems lists everything wrong with a policy file. Parse and Load
// return it wrapped as errkind.BadInput; errors.As finds it.
type Problems struct {
	// File is the policy's file name as given.
	File string
	// List holds one line per problem, "<JSON pointer>: <message>" for
	// problems with a place in the document.
	List []string
}

// Error names the file and lists the problems, one per line when there
// are several.
func (p *Problems) Error() string {
	if len(p.List) == 1 {
		return fmt.Sprintf("policy %s: %s", p.File, p.List[0])
	}
	return fmt.Sprintf("policy %s has %d problems:\n  %s", p.File, len(p.List), strings.Join(p.List, "\n  "))
}

func (p *Problems) add(pointer, format string, args ...any) {
	msg := fmt.Sprintf(format, args...)
	if pointer != "" {
		msg = pointer + ": " + msg
	}
	p.List = append(p.List, msg)
}

func (p *Problems) err() error {
	if len(p.List) == 0 {
		return nil
	}
	return errkind.Wrap(errkind.BadInput, p)
}

// Load reads and parses the policy file at path (see Parse). A file that
// cannot be read, or is larger than MaxFileBytes, is errkind.BadInput.
func Load(path string, opts ...LoadOption) (*Policy, error) {
	if err := regularFile(path); err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("reading policy: %w", err))
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("reading policy: %w", err))
	}
	defer f.Close()
	raw, err := io.ReadAll(io.LimitReader(f, MaxFileBytes+1))
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("reading policy %s: %w", path, err))
	}
	return Parse(path, raw, opts...)
}

// A LoadOption changes how Load and Parse read a policy.
type LoadOption func(*loadOptions)

type loadOptions struct{ skipKeyFiles bool }

// SkipKeyFiles leaves the keys a policy names by keyFile unread: their
// Key.PublicKey is nil and a missing file is no error. For callers that
// judge no signature — a gate shard, which runs where only the policy
// file may be mounted. Inline keys are still parsed and checked. A policy
// loaded so, with a key file it did not read, has no Digest ("") and no
// canonical form: its identity covers its keys. Its FileDigest is set.
func SkipKeyFiles() LoadOption { return func(o *loadOptions) { o.skipKeyFiles = true } }

// Parse parses a policy from raw, the bytes of the file called name. name
// appears in messages and locates key files: a keyFile is resolved
// relative to name's directory. The format is JSON when name ends in
// .json, YAML when it ends in .yaml or .yml, and otherwise JSON when the
// first non-space byte is '{' and YAML if not.
//
// Every problem found is reported, each labelled by its JSON pointer in
// the document: the error is errkind.BadInput wrapping *Problems. Schema
// violations are reported first and alone; the cross-field rules (valid
// references, distinct targets and keys, m ≤ n, readable ed25519 keys)
// run on a document that passes the schema.
func Parse(name string, raw []byte, opts ...LoadOption) (*Policy, error) {
	var o loadOptions
	for _, opt := range opts {
		opt(&o)
	}
	probs := &Problems{File: name}
	if len(raw) > MaxFileBytes {
		probs.add("", "file is larger than %d bytes", MaxFileBytes)
		return nil, probs.err()
	}
	doc, ok := toJSON(name, raw, probs)
	if !ok {
		return nil, probs.err()
	}
	if err := schemaCheck(doc, probs); err != nil {
		return nil, err
	}
	if len(probs.List) > 0 {
		return nil, probs.err()
	}
	p := build(name, doc, probs, o)
	if err := probs.err(); err != nil {
		return nil, err
	}
	sum := sha256.Sum256(raw)
	p.fileDigest = "sha256:" + hex.EncodeToString(sum[:])
	canon, err := canonical(name, doc)
	if err != nil && o.skipKeyFiles && p.keyFileUnread() {
		// The canonical form holds every key: without its key files the
		// policy has no identity (Digest is "").
		return p, nil
	}
	if err != nil {
		probs.add("", "%v", err)
		return nil, probs.err()
	}
	sum = sha256.Sum256(canon)
	p.digest = "sha256:" + hex.EncodeToString(sum[:])
	p.canonical = canon
	return p, nil
}

// keyFileUnread reports whether a key the policy names by keyFile was
// left unread (see SkipKeyFiles).
func (p *Policy) keyFileUnread() bool {
	for i := range p.Rules {
		r := &p.Rules[i]
		for _, list := range [][]Key{r.Approvals.Approvers, r.Approvals.ReportSigners, r.Releasers.Promote, r.Releasers.Rollback} {
			for _, k := range list {
				if k.KeyFile != "" && k.PublicKey == nil {
					return true
				}
			}
		}
	}
	return false
}

// Retention is what the store collector may remove. Whatever it says,
// release records and everything they reach are never eligible (package
// retain enforces that); Retention only widens what else may go.
type Retention struct {
	// Grace: nothing younger is eligible, manifest or blob. Default 168h.
	Grace time.Duration
	// Repositories are the per-repository rules in file order; the first
	// whose Pattern matches a repository applies to it.
	Repositories []RepositoryRetention
}

// RepositoryRetention is the retention of the repositories Pattern
// matches.
type RepositoryRetention struct {
	// Pattern is a repository name or a path.Match pattern.
	Pattern string
	// KeepCandidates is how many of the newest models that nothing else
	// keeps are kept. Default 10.
	KeepCandidates int
	// ExpireTags are the tags that may expire, in file order.
	ExpireTags []TagExpiry
}

// TagExpiry lets the tags matching Pattern (path.Match) stop keeping
// their artifact once it is older than After (≥ the grace period).
type TagExpiry struct {
	Pattern string
	After   time.Duration
}

// For returns the retention of repo: the first entry whose pattern
// matches it, nil when none does (then nothing in repo is eligible).
func (r *Retention) For(repo string) *RepositoryRetention {
	if r == nil {
		return nil
	}
	for i := range r.Repositories {
		if ok, _ := path.Match(r.Repositories[i].Pattern, repo); ok {
			return &r.Repositories[i]
		}
	}
	return nil
}

// Expiry returns the expiry whose pattern matches tag first, nil when
// none does (the tag keeps its artifact).
func (r *RepositoryRetention) Expiry(tag string) *TagExpiry {
	if r == nil {
		return nil
	}
	for i := range r.ExpireTags {
		if ok, _ := path.Match(r.ExpireTags[i].Pattern, tag); ok {
			return &r.ExpireTags[i]
		}
	}
	return nil
}
