package release

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"sort"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/version"
)

// GateReportStatement is the predicate of a signed gate report: it binds
// the report's JSON by digest and repeats what the report is bound to.
type GateReportStatement struct {
	// Report is the sha256 digest ("sha256:…") of the report's JSON, the
	// report artifact's config blob.
	Report       string `json:"report"`
	Target       string `json:"target"`
	Verdict      string `json:"verdict"`
	Baseline     string `json:"baseline,omitempty"`
	Holdout      string `json:"holdout,omitempty"`
	PolicyDigest string `json:"policyDigest"`
	ToolVersion  string `json:"toolVersion"`
	Signer       Actor  `json:"signer"`
}

// Gate report media types and values this package reads (the gate
// report's JSON form, schemas/report.schema.json; package checks writes
// it). Declared here so that release does not depend on the gate.
const (
	mediaTypeReport         = "application/vnd.modelgate.report.v1+json"
	mediaTypeShard          = "application/vnd.modelgate.shard.v1+json" // a shard's partial sums
	mediaTypeReportEnvelope = MediaTypeEnvelope
	verdictPass             = "pass"
)

// gateReport is the part of a gate report promote reads.
type gateReport struct {
	Created string   `json:"created"`
	Target  string   `json:"target"`
	Verdict string   `json:"verdict"`
	Reasons []string `json:"reasons"`
	Tool    struct {
		Version string `json:"version"`
	} `json:"tool"`
	Candidate struct {
		Digest string `json:"digest"`
	} `json:"candidate"`
	Baseline *struct {
		Digest string `json:"digest"`
	} `json:"baseline"`
	Holdout *struct {
		Digest string `json:"digest"`
	} `json:"holdout"`
	Policy struct {
		Digest string `json:"digest"`
	} `json:"policy"`
}

// ReportSigner returns a function that signs gate reports with k (gate
// --sign-key): given a report's JSON bytes it returns the DSSE envelope
// and k's id. It matches checks.ReportSigner.
func ReportSigner(k *Key) func(ctx context.Context, reportJSON []byte) ([]byte, string, error) {
	return func(ctx context.Context, reportJSON []byte) ([]byte, string, error) {
		var rep gateReport
		if err := json.Unmarshal(reportJSON, &rep); err != nil {
			return nil, "", fmt.Errorf("reading the report to sign: %w", err)
		}
		sum := sha256.Sum256(reportJSON)
		pred := GateReportStatement{Report: "sha256:" + hex.EncodeToString(sum[:]), Target: rep.Target, Verdict: rep.Verdict,
			PolicyDigest: rep.Policy.Digest, ToolVersion: rep.Tool.Version, Signer: Actor{Name: k.Name, KeyID: k.ID}}
		if rep.Baseline != nil {
			pred.Baseline = rep.Baseline.Digest
		}
		if rep.Holdout != nil {
			pred.Holdout = rep.Holdout.Digest
		}
		name := rep.Target
		if r, err := registry.ParseRef(rep.Target, false); err == nil {
			name = r.Repository
		}
		st, err := newStatement(name, rep.Candidate.Digest, PredicateGateReport, pred)
		if err != nil {
			return nil, "", err
		}
		env, err := Sign(ctx, k, st)
		return env, k.ID, err
	}
}

// Binding is what a gate report must be bound to for promote to use it.
type Binding struct {
	Candidate string // sha256:…
	Target    string // NAME:TAG
	Baseline  string // the tag's current target, "" when the tag is absent
	Holdout   string // the rule's holdout resolved now, "" when none
	Policy    string // policy digest
	Tool      string // tool version
	// Signers, when not empty, are the keys one of which must have signed
	// the report.
	Signers []PublicKey

	anyHoldout bool // log: the holdout the report used is not judged
}

// ReportCheck is the verdict on one stored gate report.
type ReportCheck struct {
	Digest  string `json:"digest"`
	Created string `json:"created"`
	Verdict string `json:"verdict"`
	// Baseline is the baseline the report was made against ("" none).
	Baseline string `json:"baseline,omitempty"`
	// SignedBy names the trusted key that signed it, when one did.
	SignedBy string `json:"signedBy,omitempty"`
	// Usable is true when the report passes and is bound to exactly the
	// Binding asked for.
	Usable bool `json:"usable"`
	// Why lists what does not match ("" when usable).
	Why string `json:"why,omitempty"`

	otherBaseline bool // everything matches but the baseline
	failed        bool // bound as asked, but the verdict is fail
	integrity     bool // the stored report is damaged
}

// checkReports reads every gate report referring to the candidate and
// judges each against b, newest first.
func checkReports(ctx context.Context, store registry.Store, repo string, b Binding) ([]ReportCheck, error) {
	cd, err := registry.ParseDigest(b.Candidate)
	if err != nil {
		return nil, err
	}
	descs, err := store.Referrers(ctx, repo, cd, artifact.ArtifactType("report"))
	if err != nil {
		return nil, fmt.Errorf("listing gate reports of %s: %w", b.Candidate, err)
	}
	out := make([]ReportCheck, 0, len(descs))
	for _, d := range descs {
		out = append(out, checkReport(ctx, store, repo, d.Digest, b))
	}
	sort.SliceStable(out, func(i, j int) bool { return out[i].Created > out[j].Created })
	return out, nil
}

func checkReport(ctx context.Context, store registry.Store, repo string, d v1.Hash, b Binding) ReportCheck {
	rc := ReportCheck{Digest: d.String()}
	a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: d})
	if err != nil {
		rc.Why, rc.integrity = "unreadable: "+err.Error(), errkind.Is(err, errkind.Integrity)
		return rc
	}
	switch a.Manifest.Config.MediaType {
	case mediaTypeReport:
	case mediaTypeShard:
		// A shard's partial sums share the report artifactType: not a
		// verdict, and not damage.
		rc.Why = "a shard's partial results, not a gate report: merge the shards with `modelgate gate --merge`"
		return rc
	default:
		// Another referrer under the report artifactType: nothing that
		// fails its digest, so not damage.
		rc.Why = fmt.Sprintf("not a gate report (its config is %s)", a.Manifest.Config.MediaType)
		return rc
	}
	raw, err := artifact.ReadBlob(ctx, store, repo, a.Manifest.Config, 64<<20)
	if err != nil {
		rc.Why, rc.integrity = "unreadable: "+err.Error(), errkind.Is(err, errkind.Integrity)
		return rc
	}
	var rep gateReport
	if err := json.Unmarshal(raw, &rep); err != nil {
		rc.Why, rc.integrity = "not valid JSON: "+err.Error(), true
		return rc
	}
	rc.Created, rc.Verdict = rep.Created, rep.Verdict
	if rep.Baseline != nil {
		rc.Baseline = rep.Baseline.Digest
	}
	var why []string
	if rep.Candidate.Digest != b.Candidate {
		why = append(why, "it is about candidate "+rep.Candidate.Digest)
	}
	if rep.Target != b.Target {
		why = append(why, fmt.Sprintf("it is for target %s, not %s", rep.Target, b.Target))
	}
	if rep.Policy.Digest != b.Policy {
		why = append(why, fmt.Sprintf("it was made under policy %s, not %s (the policy file changed?)", shortHex(rep.Policy.Digest), shortHex(b.Policy)))
	}
	holdout := ""
	if rep.Holdout != nil {
		holdout = rep.Holdout.Digest
	}
	if holdout != b.Holdout && !b.anyHoldout {
		why = append(why, fmt.Sprintf("it used holdout %s, the policy's holdout is now %s", orNone(holdout), orNone(b.Holdout)))
	}
	if rep.Tool.Version != b.Tool {
		why = append(why, fmt.Sprintf("it was made by modelgate %s, this is %s", rep.Tool.Version, b.Tool))
	}
	if len(b.Signers) > 0 {
		if s, err := verifyReportSignature(ctx, store, repo, a, raw, &rep, b.Signers); err != nil {
			why = append(why, err.Error())
			rc.integrity = errkind.Is(err, errkind.Integrity)
		} else {
			rc.SignedBy = s
		}
	}
	bound := len(why) == 0
	if rc.Baseline != b.Baseline {
		why = append(why, fmt.Sprintf("it was gated against baseline %s, the tag now points at %s (the tag moved since: gate again)", orNone(rc.Baseline), orNone(b.Baseline)))
		rc.otherBaseline = bound
		bound = false
	}
	if bound && rep.Verdict != verdictPass {
		why = append(why, "the gate failed: "+strings.Join(rep.Reasons, "; "))
		rc.failed = true
	}
	if len(why) > 0 {
		rc.Why = strings.Join(why, "; ")
		return rc
	}
	rc.Usable = true
	return rc
}

// verifyReportSignature checks the report's envelope layer: signed by one
// of signers, about the candidate, binding exactly the report's bytes.
func verifyReportSignature(ctx context.Context, store registry.Store, repo string, a *artifact.Artifact, reportJSON []byte, rep *gateReport, signers []PublicKey) (string, error) {
	var ld *v1.Descriptor
	for i, l := range a.Manifest.Layers {
		if l.MediaType == mediaTypeReportEnvelope {
			ld = &a.Manifest.Layers[i]
		}
	}
	if ld == nil {
		return "", fmt.Errorf("it is not signed, and the policy trusts only reports signed by %s", keyNames(signers))
	}
	raw, err := artifact.ReadBlob(ctx, store, repo, *ld, maxEnvelopeBytes)
	if err != nil {
		return "", fmt.Errorf("its signature is unreadable: %w", err)
	}
	env, err := ParseEnvelope(raw)
	if err != nil {
		return "", fmt.Errorf("its signature envelope is malformed: %v", err)
	}
	ok := env.VerifiedBy(ctx, signers)
	if len(ok) == 0 {
		return "", fmt.Errorf("it is signed by key %s, not by a report signer the policy trusts (%s)", strings.Join(env.KeyIDs(), ", "), keyNames(signers))
	}
	var pred GateReportStatement
	if env.Statement.PredicateType != PredicateGateReport || json.Unmarshal(env.Statement.Predicate, &pred) != nil {
		return "", fmt.Errorf("its signed statement is not a gate-report statement")
	}
	sum := sha256.Sum256(reportJSON)
	if pred.Report != "sha256:"+hex.EncodeToString(sum[:]) || !env.Statement.About(rep.Candidate.Digest) {
		return "", fmt.Errorf("its signed statement is about other bytes or another candidate")
	}
	return ok[0].Name + " (" + ok[0].ID + ")", nil
}

func keyNames(keys []PublicKey) string {
	var out []string
	for _, k := range keys {
		out = append(out, k.Name+" "+k.ID)
	}
	return strings.Join(out, ", ")
}

func orNone(d string) string {
	if d == "" {
		return "(none)"
	}
	return d
}

// toolVersion is the version reports must have been made by.
func toolVersion() string { return version.Version }
