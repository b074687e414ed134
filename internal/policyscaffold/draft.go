package policyscaffold

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"os"
	"sort"
	"strconv"
	"strings"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

// Approver is a person whose key a drafted policy lists.
type Approver struct {
	Name string
	// KeyFile is the public key file's path as the policy writes it
	// (relative to the policy file); Path is where to read it now.
	KeyFile, Path string
}

// DraftOptions say what to draft a policy for.
type DraftOptions struct {
	// Target is the tag the policy guards (NAME:TAG).
	Target registry.Ref
	// From is the model to measure when Target points at nothing yet (a
	// first release); ignored when Target exists.
	From *registry.Ref
	// Holdout names the holdout artifact; "" searches the store for one.
	Holdout string
	// Approvers' public keys; Required approvals (-1: all of them, at
	// most two).
	Approvers []Approver
	Required  int
	// Headroom over the measured bytes and parameters (0.25 = 25%).
	Headroom float64
}

// DraftResult is a drafted policy and the facts it was drafted from.
type DraftResult struct {
	Policy []byte `json:"-"`
	Target string `json:"target"`
	Kind   string `json:"kind"`
	// Measured is the model the budgets come from and whether it is the
	// target's baseline or the From model of a first release.
	Measured     string `json:"measured"`
	FirstRelease bool   `json:"firstRelease"`
	Bytes        int64  `json:"bytes"`
	Params       int64  `json:"params"`
	MaxBytes     int64  `json:"maxBytes"`
	MaxParams    int64  `json:"maxParams"`
	Holdout      string `json:"holdout"`
	// HoldoutCandidates are the other holdouts the search found.
	HoldoutCandidates []string `json:"holdoutCandidates,omitempty"`
	EncoderTag        string   `json:"encoderTag,omitempty"`
	Approvers         int      `json:"approvers"`
	Required          int      `json:"required"`
}

// Draft writes a commented YAML policy for o.Target from the store: the
// kind of what the tag serves (or of o.From), a holdout (named, or the
// store's holdout for that kind), budgets of the measured model with
// headroom, the scorer's encoder tag when it still points at the
// scorer's encoder, and the approvers' keys with their key ids.
func Draft(ctx context.Context, store registry.Store, o DraftOptions) (*DraftResult, error) {
	if o.Target.Tag == "" || o.Target.HasDigest() {
		return nil, errkind.New(errkind.BadInput, "target %q: want NAME:TAG", o.Target.String())
	}
	if o.Headroom < 0 || o.Headroom > 10 || math.IsNaN(o.Headroom) {
		return nil, errkind.New(errkind.BadInput, "--headroom %v: want a fraction between 0 and 10", o.Headroom)
	}
	res := &DraftResult{Target: o.Target.String()}
	ref := o.Target
	if _, err := store.Resolve(ctx, o.Target.Repository, o.Target.Tag); errors.Is(err, registry.ErrNotFound) {
		if o.From == nil {
			return nil, errkind.New(errkind.BadInput, "%s points at nothing yet: name the model to measure for a first release with --from NAME:TAG", o.Target)
		}
		ref, res.FirstRelease = *o.From, true
	} else if err != nil {
		return nil, err
	}
	l, err := artifact.Load(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	if len(l.Problems) > 0 || l.Spec == nil {
		return nil, errkind.New(errkind.Integrity, "%s: %s", ref, strings.Join(l.Problems, "; "))
	}
	res.Kind = l.Spec.Kind
	res.Measured = ref.Repository + "@" + l.Artifact.Desc.Digest.String()
	fp := checks.Measure(l)
	res.Bytes, res.Params = fp.Bytes, fp.Params
	res.MaxBytes = int64(math.Ceil(float64(fp.Bytes) * (1 + o.Headroom)))
	res.MaxParams = int64(math.Ceil(float64(fp.Params) * (1 + o.Headroom)))

	// The holdout.
	if o.Holdout != "" {
		h, err := registry.ParseRef(o.Holdout, false)
		if err != nil {
			return nil, err
		}
		info, err := holdoutInfo(ctx, store, h)
		if err != nil {
			return nil, err
		}
		if res.Kind == policy.KindScorer && !info.HasLabels {
			return nil, errkind.New(errkind.BadInput, "holdout %s has no labels: a scorer's holdout check needs them", o.Holdout)
		}
		res.Holdout = o.Holdout
	} else {
		found, err := findHoldouts(ctx, store, res.Kind == policy.KindScorer)
		if err != nil {
			return nil, err
		}
		if len(found) == 0 {
			return nil, errkind.New(errkind.BadInput, "no %sholdout in the store: push one (push --kind holdout) or name it with --holdout", map[bool]string{true: "labelled ", false: ""}[res.Kind == policy.KindScorer])
		}
		// Prefer a holdout whose repository shares the target's first word.
		stem := strings.SplitN(o.Target.Repository, "-", 2)[0]
		sort.SliceStable(found, func(i, j int) bool {
			return strings.HasPrefix(found[i], stem) && !strings.HasPrefix(found[j], stem)
		})
		res.Holdout, res.HoldoutCandidates = found[0], found[1:]
	}

	// A scorer's encoder tag, when the tag its spec names still points at
	// the encoder it uses.
	if res.Kind == policy.KindScorer && l.Spec.Encoder != nil && l.Spec.Encoder.Name != "" {
		if er, err := registry.ParseRef(l.Spec.Encoder.Name, false); err == nil && er.Tag != "" && !er.HasDigest() {
			if d, err := store.Resolve(ctx, er.Repository, er.Tag); err == nil && d.Digest.String() == l.Spec.Encoder.Digest {
				res.EncoderTag = er.String()
			}
		}
	}

	// Approvers.
	type key struct{ name, file, id string }
	var keys []key
	for _, a := range o.Approvers {
		pemText, err := os.ReadFile(a.Path)
		if err != nil {
			return nil, errkind.New(errkind.BadInput, "approver %s: %v", a.Name, err)
		}
		pub, err := policy.ParsePublicKey(pemText)
		if err != nil {
			return nil, errkind.New(errkind.BadInput, "approver %s: %s: %v", a.Name, a.Path, err)
		}
		keys = append(keys, key{a.Name, a.KeyFile, release.KeyID(pub)})
	}
	res.Approvers = len(keys)
	res.Required = o.Required
	if res.Required < 0 {
		res.Required = min(2, len(keys))
	}
	if res.Required > len(keys) {
		return nil, errkind.New(errkind.BadInput, "--required %d: only %d approver(s) given", res.Required, len(keys))
	}

	var b bytes.Buffer
	w := func(format string, args ...any) { fmt.Fprintf(&b, format+"\n", args...) }
	q := func(s string) string { return strconv.Quote(s) }
	w("# Starting policy for %s, drafted by `modelgate policy draft` from the store.", o.Target)
	if res.FirstRelease {
		w("# %s points at nothing yet; the budgets come from %s (%s).", o.Target, ref, res.Measured)
	} else {
		w("# The budgets come from what %s serves now: %s.", o.Target, res.Measured)
	}
	w("# Every property left out takes the default schemas/policy.schema.json documents;")
	w("# `modelgate policy check THIS_FILE` lists each value in force beside its default.")
	w("# Read and adjust every value: a draft measures the store, it does not know your fleet.")
	w("")
	w("schemaVersion: 1")
	w("name: %s", q(o.Target.Repository))
	w("description: %s", q("Gate and approvals for "+o.Target.String()+" (drafted from the store)."))
	w("")
	w("rules:")
	w("  - target: %s", q(o.Target.String()))
	w("    # What the tag serves is a %s: anything else pushed for it is refused.", res.Kind)
	w("    kind: %s", res.Kind)
	if res.Kind == policy.KindScorer {
		w("    # Listeners the models never trained on, with labels. Named by tag; the gate")
	} else {
		w("    # Listeners the encoder never trained on (labels not needed). Named by tag; the gate")
	}
	w("    # records the digest it resolves to.")
	if len(res.HoldoutCandidates) > 0 {
		w("    # Other holdouts in the store: %s.", strings.Join(res.HoldoutCandidates, ", "))
	}
	w("    holdout: %s", q(res.Holdout))
	w("    checks:")
	if res.Kind == policy.KindScorer {
		w("      freeze:")
		if res.EncoderTag != "" {
			w("        # The scorer must use the encoder this tag points at (it does now).")
			w("        encoderTag: %s", q(res.EncoderTag))
		} else {
			w("        # encoderTag: listener-encoder:prod   # the encoder tag the scorer must be trained on")
		}
		w("        requireFrozen: false   # true: demand the encoder embedded as constants (modelgate freeze)")
	}
	w("      contract:")
	w("        # Stored probe outputs (float64 on the training side) against the runtime's float32.")
	w("        probeTolerance: {abs: 1.0e-5, rel: 1.0e-4}")
	w("        # Fail, not warn, when no probe row can show values bound to the wrong ids.")
	w("        requireDistinctValuesProbes: true")
	w("      holdout:")
	w("        # The candidate may lose at most this much mean loss (nats per row) against the")
	w("        # baseline, at 95%% confidence.")
	w("        margin: 0.001")
	if res.Kind == policy.KindScorer {
		w("        # A first release has no baseline: these absolute limits apply instead.")
		w("        maxNormalizedEntropy: 0.99   # must beat predicting the base rate")
		w("        minAUC: 0.55                 # better than chance")
		w("        # maxLogLoss: 0.5            # nats per row, when you know what a good model scores")
		w("        # maxECE: 0.05               # calibration")
	}
	w("      budget:")
	w("        # %s measures %d bytes (with the encoder it references, if any) and %d", res.Measured, res.Bytes, res.Params)
	w("        # parameters; the limits add %.0f%% headroom.", o.Headroom*100)
	w("        maxBytes: %d", res.MaxBytes)
	w("        maxParams: %d", res.MaxParams)
	w("        # A candidate may grow at most 20%% over the baseline in bytes and parameters.")
	w("        maxGrowth: 0.2")
	w("        # latency: {candidates: 200, p50Ms: 5, p99Ms: 20, maxRatio: 2}   # measured by the gate when set")
	w("    approvals:")
	if len(keys) == 0 {
		w("      # No approvers given (--approver NAME=KEY.pub.pem): promote needs no approval.")
		w("      required: 0")
		w("      approvers: []")
	} else {
		w("      # %d of these %d people must approve a candidate before promote.", res.Required, len(keys))
		w("      required: %d", res.Required)
		w("      approvers:")
		for _, k := range keys {
			w("        - name: %s", q(k.name))
			w("          keyFile: %s   # relative to this file", q(k.file))
			w("          keyId: %s", q(k.id))
		}
	}
	w("      # The person who pushed a candidate may not approve it alone.")
	w("      allowSelfApproval: false")
	res.Policy = b.Bytes()
	return res, nil
}

func holdoutInfo(ctx context.Context, store registry.Store, ref registry.Ref) (*artifact.HoldoutInfo, error) {
	a, err := artifact.ReadArtifact(ctx, store, ref)
	if err != nil {
		return nil, err
	}
	if a.Kind() != "holdout" {
		return nil, errkind.New(errkind.BadInput, "%s is a %q artifact, not a holdout", ref, a.Manifest.ArtifactType)
	}
	raw, err := artifact.ReadBlob(ctx, store, a.Repository, a.Manifest.Config, artifact.MaxHoldoutInfoSize)
	if err != nil {
		return nil, err
	}
	var info artifact.HoldoutInfo
	if err := json.Unmarshal(raw, &info); err != nil {
		return nil, errkind.New(errkind.Integrity, "holdout %s: config is not valid: %v", ref, err)
	}
	return &info, nil
}

// findHoldouts lists NAME:TAG of every holdout in the store (labelled
// ones only when labelled), sorted.
func findHoldouts(ctx context.Context, store registry.Store, labelled bool) ([]string, error) {
	repos, err := store.Repositories(ctx)
	if errors.Is(err, registry.ErrNoCatalog) {
		return nil, errkind.New(errkind.BadInput, "this store cannot list its repositories: name the holdout with --holdout")
	}
	if err != nil {
		return nil, err
	}
	var out []string
	for _, repo := range repos {
		tags, err := store.Tags(ctx, repo)
		if err != nil {
			return nil, err
		}
		for _, tag := range tags {
			if registry.IsReservedTag(tag) {
				continue
			}
			r := registry.Ref{Repository: repo, Tag: tag}
			info, err := holdoutInfo(ctx, store, r)
			if err != nil {
				continue // not a holdout
			}
			if labelled && !info.HasLabels {
				continue
			}
			out = append(out, r.String())
		}
	}
	sort.Strings(out)
	return out, nil
}
