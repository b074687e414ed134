package release

import (
	"encoding/json"
	"os"
	"strings"
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// storeApproval signs an approval predicate about statementDigest and
// stores it as a referrer of storedUnder: how a replayed or hand-made
// approval would look.
func (e *env) storeApproval(k *Key, statementDigest, storedUnder v1.Hash, pred Approval) {
	e.t.Helper()
	st, err := newStatement(testRepo, statementDigest.String(), PredicateApproval, pred)
	if err != nil {
		e.t.Fatal(err)
	}
	env, err := Sign(e.ctx, k, st)
	if err != nil {
		e.t.Fatal(err)
	}
	subject, err := subjectOf(e.ctx, e.store, testRepo, storedUnder)
	if err != nil {
		e.t.Fatal(err)
	}
	if _, err := putArtifact(e.ctx, e.store, testRepo, ArtifactTypeApproval,
		[]artifact.Blob{artifact.NewBlob(MediaTypeEnvelope, env, nil)}, subject, nil); err != nil {
		e.t.Fatal(err)
	}
}

func (e *env) pred(who string, rep v1.Hash) Approval {
	return Approval{Target: prodRef.String(), PolicyDigest: e.pol.Digest(), ReportDigest: rep.String(),
		Approver: Actor{Name: who, KeyID: e.keys[who].ID}, Time: e.now.Format(time.RFC3339)}
}

// TestPromoteRefusals: every way an approval or a gate report can fail to
// count is refused with a message saying which, and the tag stays put.
func TestPromoteRefusals(t *testing.T) {
	type tc struct {
		name  string
		opts  envOptions
		setup func(e *env, cand, base v1.Hash) (promoter string)
		kind  errkind.Kind
		want  []string
	}
	one := envOptions{required: 1}
	two := envOptions{required: 2}
	cases := []tc{
		{"no gate report", one, func(e *env, cand, base v1.Hash) string { return "rita" },
			errkind.Unauthorized, []string{"no gate report for this candidate"}},
		{"failing gate", one, func(e *env, cand, base v1.Hash) string {
			e.report(cand, base, e.pol, checks.VerdictFail, nil)
			return "rita"
		}, errkind.GateFailed, []string{"the gate failed", "holdout: worse"}},
		{"no approvals", one, func(e *env, cand, base v1.Hash) string {
			e.report(cand, base, e.pol, checks.VerdictPass, nil)
			return "rita"
		}, errkind.Unauthorized, []string{"0 of the 1 approvals", "approved by: none; can still approve (2): ana, ben"}},
		{"forged signature", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			// mallory signs a statement that names ana's key id.
			forger := *e.keys["mallory"]
			forger.ID = e.keys["ana"].ID
			e.storeApproval(&forger, cand, cand, e.pred("ana", rep))
			return "rita"
		}, errkind.Unauthorized, []string{"does not verify with the key of ana", "0 of the 1"}},
		{"untrusted key", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("mallory", cand, rep, nil)
			return "rita"
		}, errkind.Unauthorized, []string{"does not list as an approver", "0 of the 1"}},
		{"approval for another digest", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.storeApproval(e.keys["ana"], e.models[3], cand, e.pred("ana", rep))
			return "rita"
		}, errkind.Unauthorized, []string{"for another candidate digest"}},
		{"approval for another tag", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("ana", cand, rep, func(r *ApproveRequest) { r.Target.Tag = "canary" })
			return "rita"
		}, errkind.Unauthorized, []string{"for target tiny-encoder:canary, not tiny-encoder:prod"}},
		{"approval under another policy", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			other := e.writePolicy("other.yaml", one)
			e.approve("ana", cand, rep, func(r *ApproveRequest) { r.PolicyDigest = other.Digest() })
			return "rita"
		}, errkind.Unauthorized, []string{"under policy"}},
		{"duplicate approvals count once", two, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("ana", cand, rep, nil)
			e.approve("ana", cand, rep, func(r *ApproveRequest) { r.Now = e.now.Add(-time.Minute); r.Comment = "again" })
			return "rita"
		}, errkind.Unauthorized, []string{"1 of the 2 approvals", "each key counts once"}},
		{"expired approval", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("ana", cand, rep, func(r *ApproveRequest) { r.Now = e.now.Add(-73 * time.Hour) })
			return "rita"
		}, errkind.Unauthorized, []string{"expired: given 73h0m0s ago, the policy allows 72h0m0s"}},
		{"approval dated in the future", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("ana", cand, rep, func(r *ApproveRequest) { r.Now = e.now.Add(time.Hour) })
			return "rita"
		}, errkind.Unauthorized, []string{"in the future"}},
		{"self-approval forbidden", two, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("ana", cand, rep, nil)
			e.approve("rita", cand, rep, nil)
			return "rita"
		}, errkind.Unauthorized, []string{"self-approval", "1 of the 2", "approved by: ana; can still approve (1): ben"}},
		{"self-approval needs a promoter", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("ana", cand, rep, nil)
			return ""
		}, errkind.Unauthorized, []string{"sign with --key"}},
		{"report for another baseline replayed after the tag moved", one, func(e *env, cand, base v1.Hash) string {
			rep := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			e.approve("ana", cand, rep, nil)
			e.mustPromote(e.models[2]) // the tag moves on
			return "rita"
		}, errkind.Conflict, []string{"made against another baseline", "gate again"}},
		{"report under another policy", one, func(e *env, cand, base v1.Hash) string {
			other := e.writePolicy("other.yaml", one)
			e.report(cand, base, other, checks.VerdictPass, nil)
			return "rita"
		}, errkind.Unauthorized, []string{"no passing gate report", "made under policy"}},
		{"unsigned report where the policy wants a signed one", envOptions{required: 0, signers: true}, func(e *env, cand, base v1.Hash) string {
			e.report(cand, base, e.pol, checks.VerdictPass, nil)
			return "rita"
		}, errkind.Unauthorized, []string{"it is not signed"}},
		{"report signed by an untrusted key", envOptions{required: 0, signers: true}, func(e *env, cand, base v1.Hash) string {
			e.report(cand, base, e.pol, checks.VerdictPass, e.keys["mallory"])
			return "rita"
		}, errkind.Unauthorized, []string{"not by a report signer the policy trusts"}},
		{"report edited in the store", one, func(e *env, cand, base v1.Hash) string {
			rd := e.report(cand, base, e.pol, checks.VerdictPass, nil)
			a, err := artifact.ReadArtifact(e.ctx, e.store, registry.Ref{Repository: testRepo, Digest: rd})
			if err != nil {
				e.t.Fatal(err)
			}
			p := e.blobPath(a.Manifest.Config.Digest)
			b, _ := os.ReadFile(p)
			os.Chmod(p, 0o644)
			if err := os.WriteFile(p, []byte(strings.Replace(string(b), `"verdict":"pass"`, `"verdict":"PASS"`, 1)), 0o644); err != nil {
				e.t.Fatal(err)
			}
			return "rita"
		}, errkind.Integrity, []string{"damaged"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			e := newEnv(t, c.opts)
			base := e.models[0]
			e.mustPromote(base)
			cand := e.models[1]
			promoter := c.setup(e, cand, base)
			before := e.current()
			_, err := e.promote(cand, promoter)
			wantRefusal(t, err, c.kind, c.want...)
			if e.current() != before {
				t.Errorf("the tag moved from %s to %s on a refusal", before, e.current())
			}
		})
	}
}

// TestPromoteSuccess: a valid promotion moves the tag and writes a record
// naming the report and both approvals; promoting the current target again
// changes nothing; allowing self-approval lets the promoter's own count.
func TestPromoteSuccess(t *testing.T) {
	e := newEnv(t, envOptions{required: 2, signers: true})
	first := e.mustPromote(e.models[0])
	if first.From != "" || first.To != e.models[0].String() || e.current() != first.To {
		t.Fatalf("first release: %+v, tag at %s", first, e.current())
	}
	res := e.mustPromote(e.models[1])
	if res.From != e.models[0].String() || e.current() != e.models[1].String() || res.Report == "" {
		t.Fatalf("promotion: %+v", res)
	}
	counted := 0
	for _, a := range res.Approvals {
		if a.Counted {
			counted++
		}
	}
	if counted != 2 {
		t.Errorf("%d approvals counted, want 2: %+v", counted, res.Approvals)
	}
	again, err := e.promote(e.models[1], "rita")
	if err != nil || !again.NoOp {
		t.Errorf("promoting the current target: %+v, %v", again, err)
	}
	lg, err := Log(e.ctx, e.store, prodRef, LogOptions{Trusted: []PublicKey{e.keys["rita"].Trusted()}})
	if err != nil || len(lg.Entries) != 2 || lg.Worst() != 0 {
		t.Fatalf("log: %+v, %v", lg, err)
	}
	r := lg.Entries[0].Record
	if r.Report != res.Report || len(r.Approvals) != 2 || r.By.Name != "rita" || !lg.Entries[0].Verified {
		t.Errorf("newest record: %+v", r)
	}

	s := newEnv(t, envOptions{required: 1, allowSelf: true})
	s.mustPromote(s.models[0])
	rep := s.report(s.models[1], s.models[0], s.pol, checks.VerdictPass, nil)
	s.approve("rita", s.models[1], rep, nil)
	if _, err := s.promote(s.models[1], "rita"); err != nil {
		t.Errorf("self-approval allowed by the policy: %v", err)
	}
}

// TestApproveNeedsAReport: approve refuses without a passing report for
// the current baseline.
func TestApproveNeedsAReport(t *testing.T) {
	e := newEnv(t, envOptions{required: 1})
	e.mustPromote(e.models[0])
	_, err := ApproveCheck(e.ctx, e.store, e.models[1], prodRef, e.pol)
	wantRefusal(t, err, errkind.Unauthorized, "no gate report")
	rep := e.report(e.models[1], e.models[0], e.pol, checks.VerdictPass, nil)
	got, err := ApproveCheck(e.ctx, e.store, e.models[1], prodRef, e.pol)
	if err != nil || got.Digest != rep.String() {
		t.Fatalf("with a report: %+v, %v", got, err)
	}
	// The approval's statement is an in-toto Statement v1 about the candidate.
	d := e.approve("ana", e.models[1], rep, func(r *ApproveRequest) { r.Comment = "fine" })
	s, err := readSigned(e.ctx, e.store, testRepo, d, ArtifactTypeApproval)
	if err != nil {
		t.Fatal(err)
	}
	var pred Approval
	if err := json.Unmarshal(s.Envelope.Statement.Predicate, &pred); err != nil {
		t.Fatal(err)
	}
	st := s.Envelope.Statement
	if st.Type != StatementType || st.PredicateType != PredicateApproval || !st.About(e.models[1].String()) ||
		pred.Comment != "fine" || pred.ReportDigest != rep.String() || pred.Approver.KeyID != e.keys["ana"].ID {
		t.Errorf("approval statement: %+v %+v", st, pred)
	}
}

// TestApproveShardResultsAreNotDamage: a shard's partial results share the
// gate report's artifactType; approving a candidate that has only those is
// a missing report (not authorised, exit 4), not store damage (exit 5),
// and the refusal says to merge the shards.
func TestApproveShardResultsAreNotDamage(t *testing.T) {
	e := newEnv(t, envOptions{required: 1})
	e.mustPromote(e.models[0])
	sr := &checks.ShardResult{Candidate: e.models[1].String(), Target: prodRef.String(), Shard: 0, Of: 2}
	if _, err := checks.PushShard(e.ctx, e.store, testRepo, sr); err != nil {
		t.Fatal(err)
	}
	_, err := ApproveCheck(e.ctx, e.store, e.models[1], prodRef, e.pol)
	wantRefusal(t, err, errkind.Unauthorized, "shard's partial results", "gate --merge")
}
