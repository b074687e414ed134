package release

import (
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

// initial starts target's release log at to, binding the policy the
// tests judge it by: e.pol for the encoder tag, scorerPolicy(tag) for a
// scorer tag.
func (e *env) initial(target registry.Ref, to v1.Hash) {
	e.t.Helper()
	pol := e.pol
	if target.Repository == scorerRepo {
		pol = e.scorerPolicy(target.Tag)
	}
	if _, err := Initial(e.ctx, e.store, InitialRequest{Target: target, To: to, User: "setup", Now: e.now, Policy: pol}); err != nil {
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

// reportFor stores a gate report for cand on target against baseline.
func (e *env) reportFor(target registry.Ref, kind string, cand, baseline v1.Hash, pol *policy.Policy) v1.Hash {
	e.t.Helper()
	rep := &checks.Report{SchemaVersion: 1, Tool: checks.Tool{Name: "modelgate", Version: version.Version},
		Created: time.Now().UTC().Format(time.RFC3339Nano), Target: target.String(),
		Candidate: checks.Subject{Ref: target.Repository + "@" + cand.String(), Digest: cand.String(), Kind: kind},
		Policy:    checks.Policy{Name: pol.Name, Source: pol.Source, Digest: pol.Digest()}, Verdict: checks.VerdictPass,
		Checks: []checks.CheckResult{{Name: "integrity", Status: "PASS"}}}
	rep.Baseline = &checks.Subject{Digest: baseline.String()}
	d, err := checks.PushSignedReport(e.ctx, e.store, rep, nil, nil)
	if err != nil {
		e.t.Fatal(err)
	}
	return d.Digest
}

// unitWorld: tiny-encoder:prod → models[0], tiny-scorer:prod → a scorer
// of it (s0), both released; s1 is a scorer of models[1], gated against
// s0 with models[1] gated against models[0].
type unitWorld struct {
	*env
	spol   *policy.Policy
	s0, s1 v1.Hash
}

func newUnitWorld(t *testing.T) *unitWorld {
	e := newEnv(t, envOptions{})
	w := &unitWorld{env: e, spol: e.scorerPolicy("prod")}
	e.initial(prodRef, e.models[0])
	w.s0 = e.pushScorer(0, e.models[0], "v0")
	e.initial(scorerProd, w.s0)
	w.s1 = e.pushScorer(1, e.models[1], "v1")
	e.reportFor(prodRef, "encoder", e.models[1], e.models[0], e.pol)
	e.reportFor(scorerProd, "scorer", w.s1, w.s0, w.spol)
	return w
}

func (w *unitWorld) unit(enc, sc v1.Hash) UnitRequest {
	return UnitRequest{Members: []UnitMember{
		{Candidate: enc, CandidateName: "tiny-encoder:v1", Target: prodRef, Policy: w.pol},
		{Candidate: sc, CandidateName: "tiny-scorer:v1", Target: scorerProd, Policy: w.spol},
	}, User: "tester", Key: w.keys["rita"], Now: w.now, Reason: "new code"}
}

func (w *unitWorld) tag(r registry.Ref) string {
	w.t.Helper()
	d, err := w.store.Resolve(w.ctx, r.Repository, r.Tag)
	if err != nil {
		w.t.Fatal(err)
	}
	return d.Digest.String()
}

// mustVerify requires both logs to verify with no damage.
func (w *unitWorld) mustVerify(what string) [2]*LogReport {
	w.t.Helper()
	var out [2]*LogReport
	for i, r := range []registry.Ref{prodRef, scorerProd} {
		rep, err := Log(w.ctx, w.store, r, LogOptions{})
		if err != nil {
			w.t.Fatal(err)
		}
		if rep.Worst() != 0 {
			w.t.Fatalf("%s: log of %s: %+v", what, r, rep.Findings)
		}
		out[i] = rep
	}
	return out
}

// TestUnitRelease: an encoder and its scorer move together, scorer first,
// under one signed record that each tag's log holds and verifies; a
// rollback of either tag rolls both back, as one record again.
func TestUnitRelease(t *testing.T) {
	w := newUnitWorld(t)
	res, err := PromoteUnit(w.ctx, w.store, w.unit(w.models[1], w.s1))
	if err != nil {
		t.Fatal(err)
	}
	if len(res.Members) != 2 || res.Members[0].Target != scorerProd.String() || res.Members[1].Target != prodRef.String() {
		t.Fatalf("members (in move order): %+v", res.Members)
	}
	if w.tag(prodRef) != w.models[1].String() || w.tag(scorerProd) != w.s1.String() {
		t.Fatalf("tags after the release: %s %s", w.tag(prodRef), w.tag(scorerProd))
	}
	logs := w.mustVerify("after the release")
	for i, rep := range logs {
		h := rep.Entries[0]
		if len(h.Record.Unit) != 2 || h.Record.Target != []string{prodRef.String(), scorerProd.String()}[i] || !h.Verified {
			t.Fatalf("head of %s: %+v", rep.Target, h)
		}
	}
	// The two copies carry the same signed statement, about both models.
	a, _ := registry.ParseDigest(logs[0].Head)
	b, _ := registry.ParseDigest(logs[1].Head)
	la, err := readRecord(w.ctx, w.store, testRepo, a, prodRef.String())
	if err != nil {
		t.Fatal(err)
	}
	lb, err := readRecord(w.ctx, w.store, scorerRepo, b, scorerProd.String())
	if err != nil {
		t.Fatal(err)
	}
	if la.envelope.Digest != lb.envelope.Digest || la.envelope.Digest.String() != res.Statement {
		t.Fatalf("copies carry envelopes %s and %s, result says %s", la.envelope.Digest, lb.envelope.Digest, res.Statement)
	}
	if st := la.st.Envelope.Statement; len(st.Subject) != 2 || !st.About(w.models[1].String()) || !st.About(w.s1.String()) {
		t.Fatalf("statement subjects: %+v", st.Subject)
	}

	// rollback --to is refused on a tag whose newest release was a unit.
	to := w.models[0]
	_, err = Rollback(w.ctx, w.store, RollbackRequest{Target: scorerProd, To: &to, Reason: "x", User: "oncall"})
	wantRefusal(t, err, errkind.BadInput, "without --to rolls them back together")

	rb, err := Rollback(w.ctx, w.store, RollbackRequest{Target: scorerProd, Reason: "canary: fewer subscriptions", User: "oncall", Key: w.keys["rita"]})
	if err != nil {
		t.Fatal(err)
	}
	if len(rb.With) != 2 || rb.To != w.s0.String() {
		t.Fatalf("rollback: %+v", rb)
	}
	if w.tag(prodRef) != w.models[0].String() || w.tag(scorerProd) != w.s0.String() {
		t.Fatalf("tags after the rollback: %s %s", w.tag(prodRef), w.tag(scorerProd))
	}
	logs = w.mustVerify("after the rollback")
	if k := logs[0].Entries[0].Record.Kind; k != KindRollback || len(logs[0].Entries) != 3 {
		t.Fatalf("encoder log: %+v", logs[0].Entries)
	}
	// Nothing earlier than the first records.
	_, err = Rollback(w.ctx, w.store, RollbackRequest{Target: prodRef, Reason: "again", User: "oncall"})
	wantRefusal(t, err, errkind.BadInput, "nothing earlier")
}

// TestUnitRefusals: a scorer candidate of another encoder, a missing
// report, and an encoder whose live scorers stay behind are refused with
// nothing moved.
func TestUnitRefusals(t *testing.T) {
	w := newUnitWorld(t)
	// A scorer of the old encoder cannot go with the new encoder.
	old := w.pushScorer(2, w.models[0], "v2")
	w.reportFor(scorerProd, "scorer", old, w.s0, w.spol)
	_, err := PromoteUnit(w.ctx, w.store, w.unit(w.models[1], old))
	wantRefusal(t, err, errkind.Conflict, "will point at, after this release,", "consumes encoder "+w.models[0].String())
	// No report for the encoder candidate models[2].
	s3 := w.pushScorer(3, w.models[2], "v3")
	w.reportFor(scorerProd, "scorer", s3, w.s0, w.spol)
	_, err = PromoteUnit(w.ctx, w.store, w.unit(w.models[2], s3))
	wantRefusal(t, err, errkind.Unauthorized, "tiny-encoder:prod: no gate report")
	// A second released scorer of the live encoder left behind.
	other := registry.Ref{Repository: scorerRepo, Tag: "canary"}
	w.initial(other, w.pushScorer(4, w.models[0], "v4"))
	_, err = PromoteUnit(w.ctx, w.store, w.unit(w.models[1], w.s1))
	wantRefusal(t, err, errkind.Unauthorized, "tiny-scorer:canary (scorer", "--with SCORER-CANDIDATE=tiny-scorer:canary")
	if w.tag(prodRef) != w.models[0].String() || w.tag(scorerProd) != w.s0.String() {
		t.Fatalf("a refused release moved a tag: %s %s", w.tag(prodRef), w.tag(scorerProd))
	}
	w.mustVerify("after the refusals")
}

// TestUnitInterrupted: a unit record that claimed one head and stopped is
// reported by log (the documented interrupted state) and completed by the
// next promote or rollback of any of its tags; one that could not claim
// every head is given up with nothing moved.
func TestUnitInterrupted(t *testing.T) {
	for _, stop := range []string{"one head claimed", "heads claimed", "scorer moved"} {
		t.Run(stop, func(t *testing.T) {
			w := newUnitWorld(t)
			copies := w.writeUnit(w.models[1], w.s1)
			sw := registry.TagSwapper(w.store)
			claim := func(c *unitCopy) {
				prev, _ := registry.ParseDigest(c.rec.Record.Previous)
				if err := sw.SwapTag(w.ctx, c.target.Repository, c.headTag, prev, c.rec.Desc); err != nil {
					t.Fatal(err)
				}
			}
			claim(copies[0])
			if stop != "one head claimed" {
				claim(copies[1])
			}
			if stop == "scorer moved" {
				d, _ := subjectOf(w.ctx, w.store, scorerRepo, w.s1)
				if err := sw.SwapTag(w.ctx, scorerRepo, "prod", w.s0, d); err != nil {
					t.Fatal(err)
				}
			}
			rep, err := Log(w.ctx, w.store, scorerProd, LogOptions{})
			if err != nil {
				t.Fatal(err)
			}
			var found []Finding // notes aside (the first record binds a policy)
			for _, f := range rep.Findings {
				if f.Severity != SeverityNote {
					found = append(found, f)
				}
			}
			if rep.Worst() != errkind.Integrity || len(found) != 1 || !strings.HasPrefix(found[0].Message, "interrupted: record "+copies[0].rec.Digest.String()) {
				t.Fatalf("log: %+v", rep.Findings)
			}
			// A rollback of a claimed tag completes the unit, then rolls
			// it back as a whole. (A tag not claimed yet shows nothing:
			// its log and its tag are as they were.)
			which := prodRef
			if stop == "one head claimed" {
				which = scorerProd
				if rep, _ := Log(w.ctx, w.store, prodRef, LogOptions{}); rep.Worst() != 0 {
					t.Fatalf("log of the unclaimed tag: %+v", rep.Findings)
				}
			}
			rb, err := Rollback(w.ctx, w.store, RollbackRequest{Target: which, Reason: "after the crash", User: "oncall"})
			if err != nil {
				t.Fatal(err)
			}
			if rb.Completed == "" || len(rb.With) != 2 {
				t.Fatalf("rollback: %+v", rb)
			}
			if w.tag(prodRef) != w.models[0].String() || w.tag(scorerProd) != w.s0.String() {
				t.Fatalf("tags: %s %s", w.tag(prodRef), w.tag(scorerProd))
			}
			logs := w.mustVerify("after completing")
			if n := len(logs[1].Entries); n != 3 {
				t.Fatalf("scorer log has %d entries", n)
			}
		})
	}
	t.Run("a head moved on before the claim", func(t *testing.T) {
		w := newUnitWorld(t)
		copies := w.writeUnit(w.models[1], w.s1)
		prev, _ := registry.ParseDigest(copies[0].rec.Record.Previous)
		if err := registry.TagSwapper(w.store).SwapTag(w.ctx, scorerRepo, copies[0].headTag, prev, copies[0].rec.Desc); err != nil {
			t.Fatal(err)
		}
		// The encoder's log moves on before the unit claims it (a
		// record of another process, its head pointer moved directly).
		ht, _ := headTag("prod")
		cur, _ := w.store.Resolve(w.ctx, testRepo, ht)
		other, err := writeRecord(w.ctx, w.store, testRepo, &Record{Kind: KindRollback, Target: prodRef.String(), From: w.models[0].String(),
			To: w.models[0].String(), Previous: cur.Digest.String(), Reason: "x", By: Actor{Name: "t"}, Time: w.now.Format(time.RFC3339), Policy: mustHead(t, w).Record.Policy}, nil, ptr(mustHead(t, w).released), nil, mustHead(t, w).policyLayer())
		if err != nil {
			t.Fatal(err)
		}
		if err := registry.TagSwapper(w.store).SwapTag(w.ctx, testRepo, ht, cur.Digest, other); err != nil {
			t.Fatal(err)
		}
		err = advanceUnit(w.ctx, w.store, w.store, copies)
		wantRefusal(t, err, errkind.Conflict, "nothing changed")
		if hd, _ := w.store.Resolve(w.ctx, scorerRepo, copies[0].headTag); hd.Digest.String() != copies[0].rec.Record.Previous {
			t.Fatalf("the claimed head was not given back: %s", hd.Digest)
		}
		if w.tag(prodRef) != w.models[0].String() || w.tag(scorerProd) != w.s0.String() {
			t.Fatalf("tags: %s %s", w.tag(prodRef), w.tag(scorerProd))
		}
	})
}

func ptr[T any](v T) *T { return &v }

func mustHead(t *testing.T, w *unitWorld) *loadedRecord {
	t.Helper()
	s, err := readState(w.ctx, w.store, prodRef)
	if err != nil || s.head == nil {
		t.Fatal(err)
	}
	return s.head
}

// writeUnit writes (does not advance) the unit record moving the encoder
// to enc and the scorer to sc, and returns its copies in move order.
func (w *unitWorld) writeUnit(enc, sc v1.Hash) []*unitCopy {
	w.t.Helper()
	rec := &Record{Kind: KindPromote, By: Actor{Name: "tester"}, Time: w.now.Format(time.RFC3339)}
	released := map[string][]string{}
	for _, m := range []struct {
		t    registry.Ref
		to   v1.Hash
		kind string
		pol  *policy.Policy
	}{{scorerProd, sc, "scorer", w.spol}, {prodRef, enc, "encoder", w.pol}} {
		s, err := readState(w.ctx, w.store, m.t)
		if err != nil {
			w.t.Fatal(err)
		}
		cur, _ := registry.ParseDigest(s.current())
		rep := w.reportFor(m.t, m.kind, m.to, cur, m.pol)
		list, _ := s.head.releasedList(w.ctx, w.store, m.t.Repository)
		released[m.t.String()] = appendNew(list, m.to.String())
		rec.Unit = append(rec.Unit, UnitEntry{Target: m.t.String(), From: s.current(), To: m.to.String(), Previous: s.head.Digest.String(),
			Restore: &Restore{Target: s.current(), Record: s.head.Digest.String()}, Policy: s.head.Record.Policy, PolicyDigest: s.head.Record.Policy,
			Report: rep.String()})
	}
	descs, err := writeUnitRecord(w.ctx, w.store, rec, released, nil, nil)
	if err != nil {
		w.t.Fatal(err)
	}
	var out []*unitCopy
	for i, e := range rec.Unit {
		tr, _ := registry.ParseRef(e.Target, false)
		lr, err := readRecord(w.ctx, w.store, tr.Repository, descs[i].Digest, e.Target)
		if err != nil {
			w.t.Fatal(err)
		}
		ht, _ := headTag(tr.Tag)
		out = append(out, &unitCopy{target: tr, headTag: ht, rec: lr})
	}
	return out
}

// TestUnitRollbackEndsApprovalsOfEveryMember: rolling back a release of
// several tags checks each tag's own bound policy for who may roll it
// back, and ends the gate reports and approvals of every model it takes
// a tag away from, so the same release cannot be promoted again on them.
func TestUnitRollbackEndsApprovalsOfEveryMember(t *testing.T) {
	e := newEnv(t, envOptions{})
	// The scorer tag's policy lets only ben roll it back; the encoder's
	// lets anyone.
	spol := e.scorerPolicy("prod")
	raw, err := os.ReadFile(spol.Source)
	if err != nil {
		t.Fatal(err)
	}
	p := filepath.Join(e.dir, "scorer-releasers.yaml")
	if err := os.WriteFile(p, append(raw, "    releasers:\n      rollback:\n        - {name: ben, keyFile: ben.pub.pem}\n"...), 0o644); err != nil {
		t.Fatal(err)
	}
	if spol, err = policy.Load(p); err != nil {
		t.Fatal(err)
	}
	w := &unitWorld{env: e, spol: spol}
	e.initial(prodRef, e.models[0])
	w.s0 = e.pushScorer(0, e.models[0], "v0")
	if _, err := Initial(e.ctx, e.store, InitialRequest{Target: scorerProd, To: w.s0, User: "setup", Now: e.now, Policy: spol}); err != nil {
		t.Fatal(err)
	}
	w.s1 = e.pushScorer(1, e.models[1], "v1")
	encRep := e.reportFor(prodRef, "encoder", e.models[1], e.models[0], e.pol)
	scRep := e.reportFor(scorerProd, "scorer", w.s1, w.s0, w.spol)
	if _, err := PromoteUnit(e.ctx, e.store, w.unit(e.models[1], w.s1)); err != nil {
		t.Fatal(err)
	}

	// rita may roll back the encoder tag but not the scorer tag, and the
	// rollback of either moves both: refused, nothing moved.
	_, err = Rollback(e.ctx, e.store, RollbackRequest{Target: prodRef, Reason: "canary: fewer subscriptions", Key: e.keys["rita"]})
	wantRefusal(t, err, errkind.Unauthorized, "rollback of tiny-scorer:prod", "ben")
	if w.tag(prodRef) != e.models[1].String() || w.tag(scorerProd) != w.s1.String() {
		t.Fatalf("a refused rollback moved a tag: %s %s", w.tag(prodRef), w.tag(scorerProd))
	}
	if _, err := Rollback(e.ctx, e.store, RollbackRequest{Target: prodRef, Reason: "canary: fewer subscriptions", Key: e.keys["ben"]}); err != nil {
		t.Fatal(err)
	}
	logs := w.mustVerify("after the rollback")
	for i, want := range []v1.Hash{encRep, scRep} {
		h := logs[i].Entries[0].Record
		if h.Kind != KindRollback || !contains(h.Ended, want.String()) {
			t.Errorf("the rollback's record for %s ends %v; want it to end the gate report %s", logs[i].Target, h.Ended, want)
		}
	}
	for _, m := range []struct {
		model  v1.Hash
		target registry.Ref
	}{{e.models[1], prodRef}, {w.s1, scorerProd}} {
		rb, err := RolledBack(e.ctx, e.store, m.model, m.target)
		if err != nil || len(rb) != 1 || rb[0].Reason != "canary: fewer subscriptions" {
			t.Errorf("RolledBack(%s on %s) = %+v, %v; want the one rollback with its reason", m.model, m.target, rb, err)
		}
	}
	// The same release again, on the reports the rollback ended: refused
	// for each member.
	_, err = PromoteUnit(e.ctx, e.store, w.unit(e.models[1], w.s1))
	wantRefusal(t, err, errkind.Unauthorized, "tiny-encoder:prod: "+shortHex(e.models[1].String())+" was rolled back",
		"tiny-scorer:prod: "+shortHex(w.s1.String())+" was rolled back")
	if w.tag(prodRef) != e.models[0].String() || w.tag(scorerProd) != w.s0.String() {
		t.Fatalf("the refused release moved a tag: %s %s", w.tag(prodRef), w.tag(scorerProd))
	}
	// New gate reports count again.
	e.reportFor(prodRef, "encoder", e.models[1], e.models[0], e.pol)
	e.reportFor(scorerProd, "scorer", w.s1, w.s0, w.spol)
	if _, err := PromoteUnit(e.ctx, e.store, w.unit(e.models[1], w.s1)); err != nil {
		t.Fatalf("the release with new gate reports: %v", err)
	}
	w.mustVerify("after the release again")
}

// TestUnitFirstReleaseRefused: a tag with no release log cannot be a
// member of a release of several tags; the refusal says why and names the
// one-tag promote that gives it its first release (and binds its policy),
// and nothing moves.
func TestUnitFirstReleaseRefused(t *testing.T) {
	w := newUnitWorld(t)
	canary := registry.Ref{Repository: scorerRepo, Tag: "canary"}
	cpol := w.scorerPolicy("canary")
	req := UnitRequest{Members: []UnitMember{
		{Candidate: w.models[1], Target: prodRef},
		{Candidate: w.s1, Target: canary, Policy: cpol},
	}, User: "tester", Now: w.now}
	_, err := PromoteUnit(w.ctx, w.store, req)
	wantRefusal(t, err, errkind.BadInput, "tiny-scorer:canary has no release log yet", "cannot be given back by compare-and-swap",
		"`modelgate promote CANDIDATE --to tiny-scorer:canary --policy FILE --key KEY`")
	if w.tag(prodRef) != w.models[0].String() {
		t.Fatalf("the refused release moved %s", prodRef)
	}
	if _, err := w.store.Resolve(w.ctx, scorerRepo, "release-canary"); err == nil {
		t.Fatal("the refused release started a release log of tiny-scorer:canary")
	}
}
