package release

import (
	"context"
	"strings"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// TestBindLegacyLog: a release log written before policies were bound
// (its promote records name the policy file's digest and carry no
// policy) can only adopt the policy its newest promotion was judged
// under; promote refuses the tag until then.
func TestBindLegacyLog(t *testing.T) {
	e := newEnv(t, envOptions{})
	if _, err := Initial(e.ctx, e.store, InitialRequest{Target: prodRef, To: e.models[0], Key: e.keys["rita"], Now: e.now}); err != nil {
		t.Fatal(err)
	}
	// What an older modelgate's promote left: PolicyDigest is the file
	// digest, no bound policy.
	s, err := readState(e.ctx, e.store, prodRef)
	if err != nil {
		t.Fatal(err)
	}
	released, _ := s.head.releasedList(e.ctx, e.store, testRepo)
	rec := &Record{Kind: KindPromote, Target: prodRef.String(), From: s.current(), To: e.models[1].String(),
		PolicyDigest: e.pol.FileDigest(), Time: e.now.Format("2006-01-02T15:04:05Z"), Previous: s.head.Digest.String(),
		Restore: &Restore{Target: s.current(), Record: s.head.Digest.String()}}
	d, err := writeRecord(e.ctx, e.store, testRepo, rec, appendNew(released, rec.To), nil, e.keys["rita"], nil)
	if err != nil {
		t.Fatal(err)
	}
	_, to, _ := e.store.Manifest(e.ctx, testRepo, e.models[1])
	if err := e.store.SwapTag(e.ctx, testRepo, "prod", e.models[0], to); err != nil {
		t.Fatal(err)
	}
	if err := e.store.SwapTag(e.ctx, testRepo, "release-prod", s.head.Digest, d); err != nil {
		t.Fatal(err)
	}
	if lg := e.log(); lg.Worst() != 0 {
		t.Fatalf("legacy log: %+v", lg.Findings)
	}

	_, err = e.promote(e.models[2], "rita")
	wantRefusal(t, err, errkind.Unauthorized, "from before policies were bound", "modelgate policy bind")

	other := e.writePolicy("other.yaml", envOptions{required: 0})
	_, err = BindPolicy(e.ctx, e.store, PolicyChangeRequest{Target: prodRef, Policy: other, Key: e.keys["rita"], Now: e.now})
	wantRefusal(t, err, errkind.Unauthorized, "was judged under policy")
	res, err := BindPolicy(e.ctx, e.store, PolicyChangeRequest{Target: prodRef, Policy: e.pol, Key: e.keys["rita"], Now: e.now})
	if err != nil || !res.Adopted {
		t.Fatalf("binding the policy of the newest promotion: %+v %v", res, err)
	}
	b, err := BoundPolicy(e.ctx, e.store, prodRef)
	if err != nil || b.Policy == nil || b.Policy.Digest() != e.pol.Digest() {
		t.Fatalf("bound policy after the upgrade: %+v %v", b, err)
	}
	if lg := e.log(); lg.Worst() != 0 || !strings.Contains(findings(lg, SeverityNote), "the first policy of the tag") {
		t.Errorf("log after the upgrade: %+v", lg.Findings)
	}
	e.mustPromote(e.models[2])
	// A plain rollback passes over the policy record to the release before.
	res2, err := e.rollback(nil, false)
	if err != nil || res2.To != e.models[1].String() {
		t.Fatalf("rollback over a policy record: %+v %v", res2, err)
	}
	if lg := e.log(); lg.Worst() != 0 {
		t.Errorf("log after the rollback: %+v", lg.Findings)
	}
}

// policyRacer is a store whose first move of tiny-encoder:prod is
// followed, before anything else, by a policy record of the same parent
// taking the head pointer: what a concurrent `policy bind` does to a
// promote between its two compare-and-swaps.
type policyRacer struct {
	*registry.Local
	e    *env
	done bool
}

func (p *policyRacer) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	if err := p.Local.SwapTag(ctx, repo, tag, old, desc); err != nil || tag != "prod" || p.done {
		return err
	}
	p.done = true
	s, err := readState(ctx, p.Local, prodRef)
	if err != nil {
		return err
	}
	h := s.head.Record
	rec := &Record{Kind: KindPolicy, Target: h.Target, From: h.To, To: h.To, PolicyDigest: h.Policy, Policy: h.Policy,
		Time: h.Time, Previous: s.head.Digest.String(), Restore: h.Restore, Reason: "the racing policy change"}
	reuse := s.head.released
	d, err := writeRecord(ctx, p.Local, repo, rec, nil, &reuse, p.e.keys["rita"], s.head.policyLayer())
	if err != nil {
		return err
	}
	return p.Local.SwapTag(ctx, repo, "release-prod", s.head.Digest, d)
}

// TestPromoteLosesToPolicyChange: a policy record that takes the head
// pointer between a promote's tag move and its head move wins; the
// promote puts the tag back and fails with a conflict, and the log
// verifies.
func TestPromoteLosesToPolicyChange(t *testing.T) {
	e := newEnv(t, envOptions{})
	e.mustPromote(e.models[0])
	e.report(e.models[1], e.models[0], e.pol, checks.VerdictPass, e.keys["ci"])
	racer := &policyRacer{Local: e.store, e: e}
	_, err := Promote(e.ctx, racer, PromoteRequest{Candidate: e.models[1], Target: prodRef, Key: e.keys["rita"], Now: e.now})
	wantRefusal(t, err, errkind.Conflict, "the policy bound to tiny-encoder:prod changed while this ran")
	if !racer.done {
		t.Fatal("the race was not staged")
	}
	if e.current() != e.models[0].String() {
		t.Errorf("the tag was left at %s", e.current())
	}
	lg := e.log()
	if lg.Worst() != 0 || len(lg.Entries) != 2 || lg.Entries[0].Record.Kind != KindPolicy {
		t.Errorf("log after the race: %d entries, %+v", len(lg.Entries), lg.Findings)
	}
	// The next promote goes through.
	e.mustPromote(e.models[1])
}
