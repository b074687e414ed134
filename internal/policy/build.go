package policy

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"path"
	"regexp"
	"strconv"
	"strings"
	"time"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/schemas"
)

// Defaults the schema documents; build applies them.
const (
	defaultMargin            = 0.001
	defaultConfidence        = 0.95
	defaultBootstrapReplicas = 200
	defaultSeed              = 1
	defaultAnomalyQuantile   = 0.99
	defaultAnomalyWeight     = 0.25
	defaultMaxNE             = 1.0
	defaultMinAUC            = 0.5
	defaultAlpha             = 0.5
	defaultWeightQuantile    = 0.99
	defaultWeightPower       = 1.0
	defaultProbeAbs          = 1e-5
	defaultProbeRel          = 1e-4
	defaultPermutationAbs    = 0
	defaultPermutationRel    = 0
	defaultExtraRows         = 256
	defaultMaxGrowth         = 0.2
	defaultCandidates        = 200
	defaultRuns              = 200
	defaultBlocks            = 5
	defaultMinSliceRows      = 100
	defaultMaxAge            = 72 * time.Hour
	defaultTailExcess        = 5.0
	// Retention defaults, our own choices (see the schema): seven days
	// of grace, ten spare candidates per repository. The grace period
	// cannot be shorter than minGrace, so that no push in flight (blobs
	// uploaded, manifest not yet written) is ever eligible.
	defaultGrace          = 168 * time.Hour
	defaultKeepCandidates = 10
	minGrace              = time.Hour
)

var quotedNumber = regexp.MustCompile(`value must be "(-?[0-9][0-9.eE+-]*)"`)

var defaultNonzeroQuantiles = []float64{0.5, 0.9}

// schemaCheck validates doc against the policy schema, adding every
// violation to probs. A non-nil error means the schema itself is broken.
func schemaCheck(doc []byte, probs *Problems) error {
	vs, err := schemas.Validate(schemas.Policy, doc)
	if err != nil {
		return errkind.New(errkind.Internal, "policy schema: %w", err)
	}
	for _, v := range vs {
		// The validator quotes numbers it holds as json.Number.
		msg := quotedNumber.ReplaceAllString(v.Message, "value must be $1")
		switch {
		case strings.HasSuffix(v.Pointer, "/checks/integrity/enabled"):
			msg += " (the integrity check cannot be disabled)"
		case strings.HasSuffix(v.Pointer, "/keyFile") && msg == "not allowed":
			msg = "not allowed together with publicKey: give one of them"
		case strings.HasSuffix(v.Pointer, "/keyId") && strings.Contains(msg, "got number"):
			// YAML reads a plain scalar of digits as a number.
			msg += ` (a key id of digits alone must be quoted: keyId: "0123456789012345")`
		}
		probs.add(orRoot(v.Pointer), "%s", msg)
	}
	return nil
}

// The wire form: pointers tell a property left out from a zero value.
type wirePolicy struct {
	SchemaVersion int        `json:"schemaVersion"`
	Name          string     `json:"name"`
	Description   string     `json:"description"`
	Rules         []wireRule `json:"rules"`
	Retention     *struct {
		Grace        *string `json:"grace"`
		Repositories []struct {
			Repository     string `json:"repository"`
			KeepCandidates *wint  `json:"keepCandidates"`
			ExpireTags     []struct {
				Tags  string `json:"tags"`
				After string `json:"after"`
			} `json:"expireTags"`
		} `json:"repositories"`
	} `json:"retention"`
}

type wireRule struct {
	Target    string        `json:"target"`
	Kind      string        `json:"kind"`
	Holdout   *string       `json:"holdout"`
	Checks    wireChecks    `json:"checks"`
	Approvals wireApprovals `json:"approvals"`
	Releasers struct {
		Promote  []wireKey `json:"promote"`
		Rollback []wireKey `json:"rollback"`
	} `json:"releasers"`
}

type wireChecks struct {
	Integrity struct {
		Enabled *bool `json:"enabled"`
	} `json:"integrity"`
	Freeze struct {
		Enabled       *bool   `json:"enabled"`
		RequireFrozen *bool   `json:"requireFrozen"`
		EncoderTag    *string `json:"encoderTag"`
	} `json:"freeze"`
	Contract struct {
		Enabled                     *bool          `json:"enabled"`
		ProbeTolerance              *wireTolerance `json:"probeTolerance"`
		BatchTolerance              *float64       `json:"batchTolerance"`
		PermutationTolerance        *wireTolerance `json:"permutationTolerance"`
		RequireDistinctValuesProbes *bool          `json:"requireDistinctValuesProbes"`
		ExtraRows                   struct {
			Count *wint `json:"count"`
			Seed  *wint `json:"seed"`
		} `json:"extraRows"`
	} `json:"contract"`
	Holdout struct {
		Enabled           *bool    `json:"enabled"`
		Margin            *float64 `json:"margin"`
		Confidence        *float64 `json:"confidence"`
		BootstrapReplicas *wint    `json:"bootstrapReplicas"`
		Seed              *wint    `json:"seed"`
		ClusterColumn     *string  `json:"clusterColumn"`
		Tail              struct {
			Excess *float64 `json:"excess"`
			Action *string  `json:"action"`
		} `json:"tail"`
		Slices struct {
			NonzeroQuantiles *[]float64 `json:"nonzeroQuantiles"`
			AnomalyQuantile  *float64   `json:"anomalyQuantile"`
			AnomalyWeight    *float64   `json:"anomalyWeight"`
			PerSliceMargin   *float64   `json:"perSliceMargin"`
			FailOnSlice      *bool      `json:"failOnSlice"`
			MinRows          *wint      `json:"minRows"`
		} `json:"slices"`
		MaxLogLoss            *float64 `json:"maxLogLoss"`
		MaxNormalizedEntropy  *float64 `json:"maxNormalizedEntropy"`
		MinAUC                *float64 `json:"minAUC"`
		MaxECE                *float64 `json:"maxECE"`
		Alpha                 *float64 `json:"alpha"`
		WeightQuantile        *float64 `json:"weightQuantile"`
		WeightPower           *float64 `json:"weightPower"`
		MaxReconstructionLoss *float64 `json:"maxReconstructionLoss"`
	} `json:"holdout"`
	Budget struct {
		Enabled      *bool    `json:"enabled"`
		MaxBytes     *wint    `json:"maxBytes"`
		MaxParams    *wint    `json:"maxParams"`
		MaxGrowth    *float64 `json:"maxGrowth"`
		MaxLoadBytes *wint    `json:"maxLoadBytes"`
		Latency      *struct {
			Candidates *wint    `json:"candidates"`
			Runs       *wint    `json:"runs"`
			Blocks     *wint    `json:"blocks"`
			P50Ms      *float64 `json:"p50Ms"`
			P99Ms      *float64 `json:"p99Ms"`
			MaxRatio   *float64 `json:"maxRatio"`
		} `json:"latency"`
	} `json:"budget"`
}

// wint is an integer in the wire form. The schema admits any number with
// no fractional part ("256.0", "2.56e2") within ±2^53, which encoding/json
// would refuse to put in an int.
type wint int64

func (w *wint) UnmarshalJSON(b []byte) error {
	f, err := strconv.ParseFloat(string(b), 64)
	if err != nil || f != math.Trunc(f) || math.Abs(f) > 1<<53 {
		return fmt.Errorf("%s is not an integer", b)
	}
	*w = wint(f)
	return nil
}

// intOr returns *p as an int, or d when p is nil.
func intOr(p *wint, d int) int {
	if p == nil {
		return d
	}
	return int(*p)
}

func seedOr(p *wint) uint64 {
	if p == nil {
		return defaultSeed
	}
	return uint64(*p)
}

func int64Ptr(p *wint) *int64 {
	if p == nil {
		return nil
	}
	return ptr(int64(*p))
}

type wireTolerance struct {
	Abs float64 `json:"abs"`
	Rel float64 `json:"rel"`
}

type wireApprovals struct {
	Required          *wint     `json:"required"`
	Approvers         []wireKey `json:"approvers"`
	AllowSelfApproval *bool     `json:"allowSelfApproval"`
	MaxAge            *string   `json:"maxAge"`
	ReportSigners     []wireKey `json:"reportSigners"`
}

type wireKey struct {
	Name      string `json:"name"`
	PublicKey string `json:"publicKey"`
	KeyFile   string `json:"keyFile"`
	KeyID     string `json:"keyId"`
}

func or[T any](p *T, d T) T {
	if p != nil {
		return *p
	}
	return d
}

func ptr[T any](v T) *T { return &v }

// orPtr returns a copy of p, or a pointer to d when p is nil.
func orPtr[T any](p *T, d T) *T { return ptr(or(p, d)) }

func clonePtr[T any](p *T) *T {
	if p == nil {
		return nil
	}
	return ptr(*p)
}

// build decodes a schema-valid document, applies the defaults and the
// cross-field rules, adding problems to probs.
func build(name string, doc []byte, probs *Problems, o loadOptions) *Policy {
	var w wirePolicy
	dec := json.NewDecoder(bytes.NewReader(doc))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&w); err != nil {
		// The schema admits a few numbers Go cannot hold (1e400).
		probs.add("", "%s", decodeMessage(err))
		return nil
	}
	p := &Policy{Name: w.Name, Description: w.Description, Source: name}
	seen := map[string]int{}
	for i := range w.Rules {
		at := fmt.Sprintf("/rules/%d", i)
		r := buildRule(name, at, &w.Rules[i], probs, o)
		if t := r.Target.String(); r.Target.Repository != "" {
			if j, dup := seen[t]; dup {
				probs.add(at+"/target", "target %q is already covered by /rules/%d: a target may appear in one rule only", t, j)
			} else {
				seen[t] = i
			}
		}
		p.Rules = append(p.Rules, r)
	}
	if w.Retention != nil {
		p.Retention = buildRetention(w, probs)
	}
	return p
}

// buildRetention applies the retention defaults and checks the patterns
// and durations the schema cannot.
func buildRetention(w wirePolicy, probs *Problems) *Retention {
	wr := w.Retention
	r := &Retention{Grace: defaultGrace}
	duration := func(at, s string) (time.Duration, bool) {
		d, err := time.ParseDuration(s)
		switch {
		case err != nil:
			probs.add(at, "%q is not a duration: write it like \"168h\" or \"90m\"", s)
		case d < minGrace:
			probs.add(at, "%q is shorter than %s: a push in flight could lose blobs it uploaded but has not yet named", s, minGrace)
		default:
			return d, true
		}
		return 0, false
	}
	if wr.Grace != nil {
		if d, ok := duration("/retention/grace", *wr.Grace); ok {
			r.Grace = d
		}
	}
	seen := map[string]int{}
	for i, wrr := range wr.Repositories {
		at := fmt.Sprintf("/retention/repositories/%d", i)
		rr := RepositoryRetention{Pattern: wrr.Repository, KeepCandidates: intOr(wrr.KeepCandidates, defaultKeepCandidates)}
		if _, err := path.Match(wrr.Repository, ""); err != nil {
			probs.add(at+"/repository", "%q is not a valid pattern: %v", wrr.Repository, err)
		} else if j, dup := seen[wrr.Repository]; dup {
			probs.add(at+"/repository", "%q is already given by /retention/repositories/%d", wrr.Repository, j)
		} else {
			seen[wrr.Repository] = i
		}
		for k, e := range wrr.ExpireTags {
			eat := fmt.Sprintf("%s/expireTags/%d", at, k)
			te := TagExpiry{Pattern: e.Tags}
			if _, err := path.Match(e.Tags, ""); err != nil {
				probs.add(eat+"/tags", "%q is not a valid pattern: %v", e.Tags, err)
			}
			if d, ok := duration(eat+"/after", e.After); ok {
				if d < r.Grace {
					probs.add(eat+"/after", "%q is shorter than the grace period %s", e.After, r.Grace)
				}
				te.After = d
			}
			rr.ExpireTags = append(rr.ExpireTags, te)
		}
		r.Repositories = append(r.Repositories, rr)
	}
	return r
}

// decodeMessage names the field of a decoding error.
func decodeMessage(err error) string {
	var te *json.UnmarshalTypeError
	if errors.As(err, &te) && te.Field != "" {
		return fmt.Sprintf("%s: cannot hold %s", "/"+strings.ReplaceAll(te.Field, ".", "/"), te.Value)
	}
	return err.Error()
}

// tagRef parses a NAME:TAG reference without a digest.
func tagRef(s string) (registry.Ref, error) {
	ref, err := registry.ParseRef(s, false)
	if err != nil {
		return registry.Ref{}, err
	}
	if ref.HasDigest() {
		return registry.Ref{}, fmt.Errorf("reference %q: want a tag NAME:TAG, without a digest", s)
	}
	if ref.Tag == "" {
		return registry.Ref{}, fmt.Errorf("reference %q: want a tag NAME:TAG", s)
	}
	return ref, nil
}

func buildRule(name, at string, w *wireRule, probs *Problems, o loadOptions) Rule {
	var r Rule
	if ref, err := tagRef(w.Target); err != nil {
		probs.add(at+"/target", "%v", err)
	} else {
		r.Target = ref
	}
	r.Kind = w.Kind
	scorer := w.Kind == KindScorer
	c := &w.Checks

	r.Integrity = IntegrityCheck{Enabled: true}

	r.Freeze = FreezeCheck{Enabled: or(c.Freeze.Enabled, true)}
	if scorer {
		r.Freeze.RequireFrozen = or(c.Freeze.RequireFrozen, false)
		if c.Freeze.EncoderTag != nil {
			if ref, err := tagRef(*c.Freeze.EncoderTag); err != nil {
				probs.add(at+"/checks/freeze/encoderTag", "%v", err)
			} else {
				r.Freeze.EncoderTag = &ref
			}
		}
	}

	tol := func(t *wireTolerance, abs, rel float64) Tolerance {
		if t == nil {
			return Tolerance{Abs: abs, Rel: rel}
		}
		return Tolerance{Abs: t.Abs, Rel: t.Rel}
	}
	r.Contract = ContractCheck{
		Enabled:                     or(c.Contract.Enabled, true),
		ProbeTolerance:              tol(c.Contract.ProbeTolerance, defaultProbeAbs, defaultProbeRel),
		BatchTolerance:              or(c.Contract.BatchTolerance, 0),
		PermutationTolerance:        tol(c.Contract.PermutationTolerance, defaultPermutationAbs, defaultPermutationRel),
		RequireDistinctValuesProbes: or(c.Contract.RequireDistinctValuesProbes, false),
		ExtraRows: ExtraRows{
			Count: intOr(c.Contract.ExtraRows.Count, defaultExtraRows),
			Seed:  seedOr(c.Contract.ExtraRows.Seed),
		},
	}

	h := &c.Holdout
	r.Holdout = HoldoutCheck{
		Enabled:           or(h.Enabled, true),
		Margin:            or(h.Margin, defaultMargin),
		Confidence:        or(h.Confidence, defaultConfidence),
		BootstrapReplicas: intOr(h.BootstrapReplicas, defaultBootstrapReplicas),
		Seed:              seedOr(h.Seed),
		ClusterColumn:     or(h.ClusterColumn, ""),
	}
	if scorer {
		qs := append([]float64(nil), or(h.Slices.NonzeroQuantiles, defaultNonzeroQuantiles)...)
		r.Holdout.Slices = Slices{
			NonzeroQuantiles: qs,
			AnomalyQuantile:  or(h.Slices.AnomalyQuantile, defaultAnomalyQuantile),
			AnomalyWeight:    or(h.Slices.AnomalyWeight, defaultAnomalyWeight),
			PerSliceMargin:   or(h.Slices.PerSliceMargin, r.Holdout.Margin),
			FailOnSlice:      or(h.Slices.FailOnSlice, false),
			MinRows:          intOr(h.Slices.MinRows, defaultMinSliceRows),
		}
		r.Holdout.MaxLogLoss = clonePtr(h.MaxLogLoss)
		r.Holdout.MaxNormalizedEntropy = orPtr(h.MaxNormalizedEntropy, defaultMaxNE)
		r.Holdout.MinAUC = orPtr(h.MinAUC, defaultMinAUC)
		r.Holdout.MaxECE = clonePtr(h.MaxECE)
		r.Holdout.Tail = Tail{Excess: or(h.Tail.Excess, defaultTailExcess), Action: or(h.Tail.Action, TailFail)}
		sp := at + "/checks/holdout/slices"
		for k := 1; k < len(qs); k++ {
			if qs[k] <= qs[k-1] {
				probs.add(fmt.Sprintf("%s/nonzeroQuantiles/%d", sp, k), "%v is not above the cut point before it (%v): cut points must be strictly increasing", qs[k], qs[k-1])
			}
		}
		for k, q := range qs {
			if q >= r.Holdout.Slices.AnomalyQuantile {
				probs.add(fmt.Sprintf("%s/nonzeroQuantiles/%d", sp, k), "cut point %v is not below anomalyQuantile %v", q, r.Holdout.Slices.AnomalyQuantile)
			}
		}
	} else {
		r.Holdout.Alpha = or(h.Alpha, defaultAlpha)
		r.Holdout.WeightQuantile = or(h.WeightQuantile, defaultWeightQuantile)
		r.Holdout.WeightPower = or(h.WeightPower, defaultWeightPower)
		r.Holdout.MaxReconstructionLoss = clonePtr(h.MaxReconstructionLoss)
	}
	if w.Holdout != nil {
		if ref, err := registry.ParseRef(*w.Holdout, false); err != nil {
			probs.add(at+"/holdout", "%v", err)
		} else {
			r.HoldoutRef = &ref
		}
	} else if r.Holdout.Enabled {
		probs.add(at, "holdout is required while the holdout check is enabled (name a holdout artifact, or set checks.holdout.enabled to false)")
	}

	b := &c.Budget
	r.Budget = BudgetCheck{
		Enabled:      or(b.Enabled, true),
		MaxBytes:     int64Ptr(b.MaxBytes),
		MaxParams:    int64Ptr(b.MaxParams),
		MaxGrowth:    or(b.MaxGrowth, defaultMaxGrowth),
		MaxLoadBytes: int64Ptr(b.MaxLoadBytes),
	}
	if l := b.Latency; l != nil {
		r.Budget.Latency = &LatencyBudget{
			Candidates: intOr(l.Candidates, defaultCandidates),
			Runs:       intOr(l.Runs, defaultRuns),
			Blocks:     intOr(l.Blocks, defaultBlocks),
			P50Ms:      clonePtr(l.P50Ms),
			P99Ms:      clonePtr(l.P99Ms),
			MaxRatio:   clonePtr(l.MaxRatio),
		}
		if lb := r.Budget.Latency; lb.Runs < lb.Blocks {
			probs.add(at+"/checks/budget/latency/runs", "runs %d is below blocks %d: every block needs at least one timed request", lb.Runs, lb.Blocks)
		}
		if l.P50Ms != nil && l.P99Ms != nil && *l.P99Ms < *l.P50Ms {
			probs.add(at+"/checks/budget/latency/p99Ms", "p99Ms %v is below p50Ms %v", *l.P99Ms, *l.P50Ms)
		}
	}

	r.Approvals = buildApprovals(name, at+"/approvals", &w.Approvals, probs, o)
	r.Releasers = Releasers{
		Promote:  buildKeys(name, at+"/releasers/promote", "promoter", w.Releasers.Promote, probs, o),
		Rollback: buildKeys(name, at+"/releasers/rollback", "rollback signer", w.Releasers.Rollback, probs, o),
	}
	return r
}

func buildApprovals(name, at string, w *wireApprovals, probs *Problems, o loadOptions) Approvals {
	a := Approvals{
		Required:          intOr(w.Required, 0),
		AllowSelfApproval: or(w.AllowSelfApproval, false),
		MaxAge:            defaultMaxAge,
	}
	if w.MaxAge != nil {
		d, err := time.ParseDuration(*w.MaxAge)
		switch {
		case err != nil:
			probs.add(at+"/maxAge", "%q is not a duration: write it like \"72h\" or \"90m\"", *w.MaxAge)
		case d <= 0:
			probs.add(at+"/maxAge", "%q: the duration must be positive", *w.MaxAge)
		default:
			a.MaxAge = d
		}
	}
	a.Approvers = buildKeys(name, at+"/approvers", "approver", w.Approvers, probs, o)
	a.ReportSigners = buildKeys(name, at+"/reportSigners", "report signer", w.ReportSigners, probs, o)
	if a.Required > len(w.Approvers) {
		probs.add(at+"/required", "%d approvals required but only %d approver(s) listed", a.Required, len(w.Approvers))
	}
	return a
}
