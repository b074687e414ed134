package release

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"modelgate/internal/artifact"
	"modelgate/internal/checks"
	"modelgate/internal/errkind"
	"modelgate/internal/fixture"
	"modelgate/internal/model/modeldir"
	"modelgate/internal/policy"
	"modelgate/internal/registry"
)

const scorerRepo = "tiny-scorer"

var scorerProd = registry.Ref{Repository: scorerRepo, Tag: "prod"}

// pushScorer pushes a tiny scorer built on encoder enc (spec name varied
// by i, so each has its own digest) as tiny-scorer:<tag>.
func (e *env) pushScorer(i int, enc v1.Hash, tag string) v1.Hash {
	e.t.Helper()
	m := fixture.ScorerModel(fixture.EncoderModel(), enc.String())
	m.Spec.Name = fmt.Sprintf("tiny-promo-scorer-%d", i)
	m.Spec.Encoder.Name = testRepo + ":v0"
	dir := filepath.Join(e.dir, "models", m.Spec.Name)
	if err := modeldir.Write(dir, m); err != nil {
		e.t.Fatal(err)
	}
	res, err := artifact.PushModelDir(e.ctx, e.store, dir, registry.Ref{Repository: scorerRepo, Tag: tag}, artifact.Options{})
	if err != nil {
		e.t.Fatal(err)
	}
	d, _ := registry.ParseDigest(res.Digest)
	return d
}

func (e *env) initial(target registry.Ref, to v1.Hash) {
	e.t.Helper()
	if _, err := Initial(e.ctx, e.store, InitialRequest{Target: target, To: to, User: "setup", Now: e.now}); err != nil {
		e.t.Fatal(err)
	}
}

// scorerPolicy writes a policy for tiny-scorer:<tags> tied to
// tiny-encoder:prod's encoder, no approvals.
func (e *env) scorerPolicy(tags ...string) *policy.Policy {
	e.t.Helper()
	text := "schemaVersion: 1\nname: tiny-scorer\nrules:\n"
	for _, tag := range tags {
		text += fmt.Sprintf(`  - target: tiny-scorer:%s
    kind: scorer
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
      freeze: {encoderTag: "tiny-encoder:prod"}
    approvals: {required: 0}
`, tag)
	}
	p := filepath.Join(e.dir, "scorer-policy.yaml")
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		e.t.Fatal(err)
	}
	pol, err := policy.Load(p)
	if err != nil {
		e.t.Fatal(err)
	}
	return pol
}

// TestEncoderAloneRefused: an encoder cannot move under the scorers that
// consume its live target, whether they are found by their release logs
// or by a scorer rule naming the encoder tag; a scorer of another encoder
// does not hold it back.
func TestEncoderAloneRefused(t *testing.T) {
	e := newEnv(t, envOptions{})
	e.initial(prodRef, e.models[0])
	s0 := e.pushScorer(0, e.models[0], "v0")
	e.initial(scorerProd, s0)
	before := e.current()
	e.report(e.models[1], e.models[0], e.pol, checks.VerdictPass, nil)
	_, err := Promote(e.ctx, e.store, PromoteRequest{Candidate: e.models[1], Target: prodRef, Policy: e.pol, User: "tester",
		CandidateName: "tiny-encoder:v1", Now: e.now})
	wantRefusal(t, err, errkind.Unauthorized, "tiny-scorer:prod (scorer "+shortHex(s0.String())+")",
		"modelgate promote tiny-encoder:v1 --to tiny-encoder:prod --with SCORER-CANDIDATE=tiny-scorer:prod")
	if got := e.current(); got != before {
		t.Fatalf("the refused promote moved the tag to %s", got)
	}

	// A scorer tag with no release log, named by a scorer rule that ties
	// it to tiny-encoder:prod, holds the encoder back too.
	if _, err := Initial(e.ctx, e.store, InitialRequest{Target: scorerProd, To: e.pushScorer(1, e.models[3], "v1"), User: "setup"}); err == nil {
		t.Fatal("a second initial record on a tag with a release log was accepted")
	}
	ds := e.pushScorer(2, e.models[0], "canary")
	spol := e.scorerPolicy("canary")
	deps, err := Dependents(e.ctx, e.store, prodRef, e.models[0].String(), []*policy.Policy{spol})
	if err != nil {
		t.Fatal(err)
	}
	if got := fmt.Sprint(deps); !strings.Contains(got, "tiny-scorer:canary "+ds.String()) || !strings.Contains(got, "tiny-scorer:prod "+s0.String()) || len(deps) != 2 {
		t.Fatalf("dependents of %s: %v", e.models[0], deps)
	}
	// Without the policy, tiny-scorer:canary (no release log) is not
	// found: only released tags count by lineage.
	if deps, _ := Dependents(e.ctx, e.store, prodRef, e.models[0].String(), nil); len(deps) != 1 {
		t.Fatalf("dependents without the scorer policy: %v", deps)
	}
}

// TestEncoderMovesWhenNoScorerConsumesIt: a released scorer of another
// encoder does not hold the encoder tag back.
func TestEncoderMovesWhenNoScorerConsumesIt(t *testing.T) {
	e := newEnv(t, envOptions{})
	e.initial(prodRef, e.models[0])
	e.initial(scorerProd, e.pushScorer(0, e.models[2], "v0"))
	e.report(e.models[1], e.models[0], e.pol, checks.VerdictPass, nil)
	if _, err := e.promote(e.models[1], ""); err != nil {
		t.Fatal(err)
	}
	if e.current() != e.models[1].String() {
		t.Fatalf("tag at %s", e.current())
	}
}
