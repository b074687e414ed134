package release

import (
	"context"
	"encoding/json"
	"fmt"
	"strings"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// Approval is the predicate of an approval statement: a person, by their
// key, says the statement's subject (a candidate) may go to Target.
type Approval struct {
	// Target is NAME:TAG.
	Target string `json:"target"`
	// PolicyDigest is the sha256 of the policy file the approval is under.
	PolicyDigest string `json:"policyDigest"`
	// ReportDigest is the manifest digest of the passing gate report the
	// approver saw.
	ReportDigest string `json:"gateReportDigest"`
	// Approver names the signing key.
	Approver Actor `json:"approver"`
	// Time is when the approval was given (RFC 3339, UTC).
	Time string `json:"time"`
	// Comment is free text, "" when none.
	Comment string `json:"comment,omitempty"`
}

// Actor is who did something: a key holder's name and key id, or, for an
// unsigned record, the local user's name and no key id.
type Actor struct {
	Name  string `json:"name"`
	KeyID string `json:"keyId,omitempty"`
}

func (a Actor) String() string {
	if a.KeyID == "" {
		return a.Name + " (unsigned)"
	}
	if a.Name == "" {
		return a.KeyID
	}
	return a.Name + " (" + a.KeyID + ")"
}

// ApproveRequest is what Approve needs.
type ApproveRequest struct {
	// Candidate is the candidate's manifest digest, in Target's repository.
	Candidate v1.Hash
	// Target is the tag the approval is for.
	Target registry.Ref
	// PolicyDigest is the policy's digest.
	PolicyDigest string
	// Report is the manifest digest of the passing gate report approved.
	Report v1.Hash
	// Key signs the approval.
	Key *Key
	// Comment is optional free text.
	Comment string
	// Now is the approval time; zero means time.Now.
	Now time.Time
}

// Approve signs an approval statement and stores it as an artifact whose
// subject is the candidate. It returns the approval's manifest
// descriptor. It does not judge the report: see ApprovableReport.
func Approve(ctx context.Context, store registry.Store, req ApproveRequest) (v1.Descriptor, error) {
	if req.Key == nil {
		return v1.Descriptor{}, errkind.New(errkind.BadInput, "an approval needs a signing key")
	}
	now := req.Now
	if now.IsZero() {
		now = time.Now()
	}
	repo := req.Target.Repository
	subject, err := subjectOf(ctx, store, repo, req.Candidate)
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("the candidate %s: %w", req.Candidate, err)
	}
	pred := Approval{Target: req.Target.String(), PolicyDigest: req.PolicyDigest, ReportDigest: req.Report.String(),
		Approver: Actor{Name: req.Key.Name, KeyID: req.Key.ID}, Time: now.UTC().Format(time.RFC3339), Comment: req.Comment}
	st, err := newStatement(repo, req.Candidate.String(), PredicateApproval, pred)
	if err != nil {
		return v1.Descriptor{}, err
	}
	env, err := Sign(ctx, req.Key, st)
	if err != nil {
		return v1.Descriptor{}, err
	}
	ann := map[string]string{
		artifact.AnnotationCreated: pred.Time,
		AnnotationTarget:           pred.Target,
		AnnotationSigner:           req.Key.ID,
	}
	return putArtifact(ctx, store, repo, ArtifactTypeApproval,
		[]artifact.Blob{artifact.NewBlob(MediaTypeEnvelope, env, map[string]string{artifact.AnnotationTitle: "approval.dsse.json"})}, subject, ann)
}

// ApprovalCheck is the verdict on one stored approval.
type ApprovalCheck struct {
	Digest string `json:"digest"`
	// Approver is who signed it when Verified, else who it claims signed.
	Approver Actor `json:"approver"`
	// Verified is true when a key the policy lists as an approver signed
	// it and it names that key.
	Verified bool   `json:"verified"`
	Time     string `json:"time,omitempty"`
	Comment  string `json:"comment,omitempty"`
	// Counted is true when the approval counts towards the policy's m.
	Counted bool `json:"counted"`
	// Why says why it does not count ("" when it counts).
	Why string `json:"why,omitempty"`

	integrity bool // the stored approval is damaged
}

// approvalContext is what an approval must match to count.
type approvalContext struct {
	candidate string // sha256:…
	target    string
	policy    string
	reports   map[string]bool // acceptable gate report digests
	approvers []PublicKey
	maxAge    time.Duration
	now       time.Time
	// promoter is the key id of who promotes ("" when unsigned);
	// allowSelf says whether their own approval counts.
	promoter  string
	allowSelf bool
	// promoterNames are the names the policy gives the promoter's key:
	// an approval by a key the policy gives one of these names is theirs
	// too.
	promoterNames map[string]bool
	// ended are approvals a rollback ended, with why.
	ended map[string]string
}

// maxClockSkew is how far in the future an approval may be dated: the
// tolerance MIT Kerberos allows between clocks by default (clockskew, 300
// seconds; krb5.conf documentation), a published figure for machines whose
// clocks are synchronised but not equal.
const maxClockSkew = 5 * time.Minute

// checkApprovals reads every approval referring to the candidate and says
// which count. Approvals by one key count once (the newest valid one).
func checkApprovals(ctx context.Context, store registry.Store, repo string, c approvalContext) ([]ApprovalCheck, int, error) {
	cd, err := registry.ParseDigest(c.candidate)
	if err != nil {
		return nil, 0, err
	}
	descs, err := store.Referrers(ctx, repo, cd, ArtifactTypeApproval)
	if err != nil {
		return nil, 0, fmt.Errorf("listing approvals of %s: %w", c.candidate, err)
	}
	var out []ApprovalCheck
	counted := map[string]int{} // key id → index in out
	for _, d := range descs {
		ac := checkApproval(ctx, store, repo, d.Digest, c)
		if ac.Counted {
			if j, dup := counted[ac.Approver.KeyID]; dup {
				// Keep the newer one counted; RFC 3339 UTC strings sort by time.
				if ac.Time > out[j].Time {
					out[j].Counted, out[j].Why = false, "another approval by the same key counts instead (each key counts once)"
					counted[ac.Approver.KeyID] = len(out)
				} else {
					ac.Counted, ac.Why = false, "another approval by the same key counts instead (each key counts once)"
				}
			} else {
				counted[ac.Approver.KeyID] = len(out)
			}
		}
		out = append(out, ac)
	}
	return out, len(counted), nil
}

func checkApproval(ctx context.Context, store registry.Store, repo string, d v1.Hash, c approvalContext) ApprovalCheck {
	ac := ApprovalCheck{Digest: d.String()}
	s, err := readSigned(ctx, store, repo, d, ArtifactTypeApproval)
	if err != nil {
		ac.Why, ac.integrity = "unreadable: "+err.Error(), errkind.Is(err, errkind.Integrity)
		return ac
	}
	st := &s.Envelope.Statement
	var pred Approval
	if st.PredicateType != PredicateApproval {
		ac.Why = fmt.Sprintf("predicate type %q is not an approval", st.PredicateType)
		return ac
	}
	if err := json.Unmarshal(st.Predicate, &pred); err != nil {
		ac.Why = "malformed approval predicate: " + err.Error()
		return ac
	}
	ac.Approver, ac.Time, ac.Comment = pred.Approver, pred.Time, pred.Comment
	var why []string
	verified := s.Envelope.VerifiedBy(ctx, c.approvers)
	switch {
	case !s.Envelope.Signed():
		why = append(why, "not signed")
	case len(verified) == 0:
		if knownID(c.approvers, pred.Approver.KeyID) {
			why = append(why, fmt.Sprintf("signature does not verify with the key of %s (forged or altered)", pred.Approver))
		} else {
			why = append(why, fmt.Sprintf("signed by key %s, which the policy does not list as an approver", strings.Join(s.Envelope.KeyIDs(), ", ")))
		}
	case verified[0].ID != pred.Approver.KeyID:
		why = append(why, fmt.Sprintf("signed by %s but names approver key %s", verified[0].ID, pred.Approver.KeyID))
	default:
		ac.Approver = Actor{Name: verified[0].Name, KeyID: verified[0].ID}
		ac.Verified = true
	}
	if !st.About(c.candidate) {
		why = append(why, "it is for another candidate digest ("+subjectDigests(st)+")")
	}
	if pred.Target != c.target {
		why = append(why, fmt.Sprintf("it is for target %s, not %s", pred.Target, c.target))
	}
	if pred.PolicyDigest != c.policy {
		why = append(why, fmt.Sprintf("it is under policy %s, not %s", shortHex(pred.PolicyDigest), shortHex(c.policy)))
	}
	if !c.reports[pred.ReportDigest] {
		why = append(why, fmt.Sprintf("the gate report it approved (%s) is not a passing report for the current baseline", shortHex(pred.ReportDigest)))
	}
	t, err := time.Parse(time.RFC3339, pred.Time)
	switch {
	case err != nil:
		why = append(why, fmt.Sprintf("its time %q is not RFC 3339", pred.Time))
	case c.now.Sub(t) > c.maxAge:
		why = append(why, fmt.Sprintf("expired: given %s ago, the policy allows %s", c.now.Sub(t).Round(time.Second), c.maxAge))
	case t.Sub(c.now) > maxClockSkew:
		why = append(why, fmt.Sprintf("dated %s in the future", t.Sub(c.now).Round(time.Second)))
	}
	if len(verified) > 0 && !c.allowSelf && c.promoter != "" && (verified[0].ID == c.promoter || c.promoterNames[verified[0].Name]) {
		why = append(why, "self-approval: the approver is the one promoting, and the policy forbids approving one's own promotion")
	}
	if e, ok := c.ended[d.String()]; ok {
		why = append(why, e)
	}
	if len(why) > 0 {
		ac.Why = strings.Join(why, "; ")
		return ac
	}
	ac.Counted = true
	return ac
}

func knownID(keys []PublicKey, id string) bool {
	for _, k := range keys {
		if k.ID == id {
			return true
		}
	}
	return false
}

func subjectDigests(st *Statement) string {
	var out []string
	for _, s := range st.Subject {
		out = append(out, "sha256:"+shortHex("sha256:"+s.Digest["sha256"]))
	}
	return strings.Join(out, ", ")
}
