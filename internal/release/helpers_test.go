package release

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/version"
)

const testRepo = "tiny-encoder"

var prodRef = registry.Ref{Repository: testRepo, Tag: "prod"}

// env is a local store with tiny encoder variants pushed, keys and a
// policy for tiny-encoder:prod.
type env struct {
	t      *testing.T
	ctx    context.Context
	dir    string
	store  *registry.Local
	keys   map[string]*Key
	pol    *policy.Policy
	models []v1.Hash // tiny-encoder:v0, v1, …
	now    time.Time
}

type envOptions struct {
	required  int
	allowSelf bool
	signers   bool // reports must be signed by ci
	models    int
}

// newEnv builds the environment. Approvers: ana, ben, rita; ci signs
// reports; mallory is known to nobody.
func newEnv(t *testing.T, o envOptions) *env {
	t.Helper()
	e := &env{t: t, ctx: context.Background(), dir: t.TempDir(), keys: map[string]*Key{}, now: time.Now().UTC().Truncate(time.Second)}
	var err error
	e.store, err = registry.OpenLocal(filepath.Join(e.dir, "store"))
	if err != nil {
		t.Fatal(err)
	}
	for _, n := range []string{"ana", "ben", "rita", "ci", "mallory"} {
		k, err := GenerateKey(n)
		if err != nil {
			t.Fatal(err)
		}
		if _, _, err := WriteKeyFiles(filepath.Join(e.dir, n), k); err != nil {
			t.Fatal(err)
		}
		e.keys[n] = k
	}
	e.pol = e.writePolicy("policy.yaml", o)
	if o.models == 0 {
		o.models = 4
	}
	for i := range o.models {
		e.models = append(e.models, e.pushVariant(i))
	}
	return e
}

func (e *env) writePolicy(name string, o envOptions) *policy.Policy {
	e.t.Helper()
	signers := "[]"
	if o.signers {
		signers = "\n        - name: ci\n          keyFile: ci.pub.pem"
	}
	text := fmt.Sprintf(`schemaVersion: 1
name: tiny-%s
rules:
  - target: tiny-encoder:prod
    kind: encoder
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
    approvals:
      required: %d
      allowSelfApproval: %t
      maxAge: 72h
      approvers:
        - name: ana
          keyFile: ana.pub.pem
        - name: ben
          keyFile: ben.pub.pem
          keyId: "%s"
        - name: rita
          keyFile: rita.pub.pem
      reportSigners: %s
`, name, o.required, o.allowSelf, e.keys["ben"].ID, signers)
	p := filepath.Join(e.dir, name)
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		e.t.Fatal(err)
	}
	pol, err := policy.Load(p)
	if err != nil {
		e.t.Fatal(err)
	}
	return pol
}

// pushVariant pushes a tiny encoder whose spec name differs by i (same
// weights, another digest) as tiny-encoder:v<i>.
func (e *env) pushVariant(i int) v1.Hash {
	e.t.Helper()
	m := fixture.EncoderModel()
	m.Spec.Name = fmt.Sprintf("tiny-listener-encoder-%d", i)
	dir := filepath.Join(e.dir, "models", m.Spec.Name)
	if err := modeldir.Write(dir, m); err != nil {
		e.t.Fatal(err)
	}
	res, err := artifact.PushModelDir(e.ctx, e.store, dir, registry.Ref{Repository: testRepo, Tag: fmt.Sprintf("v%d", i)}, artifact.Options{})
	if err != nil {
		e.t.Fatal(err)
	}
	d, _ := registry.ParseDigest(res.Digest)
	return d
}

// report stores a gate report for cand against baseline (zero: first
// release) under pol, as the gate would write it, optionally signed.
// The checks are not run: these tests are about what promote does with
// a report; cmd/modelgate's tests run the real gate.
func (e *env) report(cand, baseline v1.Hash, pol *policy.Policy, verdict string, signer *Key) v1.Hash {
	e.t.Helper()
	rep := &checks.Report{SchemaVersion: 1, Tool: checks.Tool{Name: "modelgate", Version: version.Version},
		Created: time.Now().UTC().Format(time.RFC3339Nano), Target: prodRef.String(),
		Candidate: checks.Subject{Ref: testRepo + "@" + cand.String(), Digest: cand.String(), Kind: "encoder"},
		Policy:    checks.Policy{Name: pol.Name, Source: pol.Source, Digest: pol.Digest()}, Verdict: verdict,
		Checks: []checks.CheckResult{{Name: "integrity", Status: "PASS"}}}
	if baseline != (v1.Hash{}) {
		rep.Baseline = &checks.Subject{Digest: baseline.String()}
	}
	if verdict != checks.VerdictPass {
		rep.Reasons = []string{"holdout: worse than the baseline"}
	}
	var sign checks.ReportSigner
	if signer != nil {
		sign = ReportSigner(signer)
	}
	d, err := checks.PushSignedReport(e.ctx, e.store, rep, nil, sign)
	if err != nil {
		e.t.Fatal(err)
	}
	return d.Digest
}

func (e *env) approve(who string, cand, rep v1.Hash, mod func(*ApproveRequest)) v1.Hash {
	e.t.Helper()
	req := ApproveRequest{Candidate: cand, Target: prodRef, PolicyDigest: e.pol.Digest(), Report: rep, Key: e.keys[who], Now: e.now}
	if mod != nil {
		mod(&req)
	}
	d, err := Approve(e.ctx, e.store, req)
	if err != nil {
		e.t.Fatal(err)
	}
	return d.Digest
}

func (e *env) promote(cand v1.Hash, who string) (*PromoteResult, error) {
	req := PromoteRequest{Candidate: cand, Target: prodRef, Policy: e.pol, User: "tester", Now: e.now}
	if who != "" {
		req.Key = e.keys[who]
	}
	return Promote(e.ctx, e.store, req)
}

// mustPromote gates (a fabricated passing report against the current
// target), approves by ana and ben when the policy asks, and promotes.
func (e *env) mustPromote(cand v1.Hash) *PromoteResult {
	e.t.Helper()
	var base v1.Hash
	if d, err := e.store.Resolve(e.ctx, testRepo, "prod"); err == nil {
		base = d.Digest
	}
	rep := e.report(cand, base, e.pol, checks.VerdictPass, e.keys["ci"])
	rule, _ := e.pol.Rule(prodRef.String())
	for _, who := range []string{"ana", "ben", "rita"}[:rule.Approvals.Required] {
		e.approve(who, cand, rep, nil)
	}
	res, err := e.promote(cand, "rita")
	if err != nil {
		e.t.Fatalf("promote %s: %v", cand, err)
	}
	return res
}

func (e *env) current() string {
	e.t.Helper()
	d, err := e.store.Resolve(e.ctx, testRepo, "prod")
	if err != nil {
		return ""
	}
	return d.Digest.String()
}

// blobPath is where the local store keeps a blob.
func (e *env) blobPath(d v1.Hash) string {
	return filepath.Join(e.dir, "store", "blobs", "sha256", d.Hex)
}

// wantRefusal checks err is a refusal of kind k whose text has every
// fragment.
func wantRefusal(t *testing.T, err error, k errkind.Kind, fragments ...string) {
	t.Helper()
	if err == nil {
		t.Fatalf("no error, want a refusal of kind %v", k)
	}
	if got := errkind.Of(err); got != k {
		t.Errorf("kind %v (exit %d), want %v: %v", got, int(got), k, err)
	}
	for _, f := range fragments {
		if !strings.Contains(err.Error(), f) {
			t.Errorf("error lacks %q:\n%v", f, err)
		}
	}
}
