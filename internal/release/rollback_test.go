package release

import (
	"context"
	"os"
	"strings"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

func (e *env) rollback(to *v1.Hash, dry bool) (*RollbackResult, error) {
	return Rollback(e.ctx, e.store, RollbackRequest{Target: prodRef, To: to, Reason: "test", Key: e.keys["rita"], DryRun: dry})
}

func (e *env) log(trusted ...string) *LogReport {
	e.t.Helper()
	var opts LogOptions
	for _, n := range trusted {
		opts.Trusted = append(opts.Trusted, e.keys[n].Trusted())
	}
	lg, err := Log(e.ctx, e.store, prodRef, opts)
	if err != nil {
		e.t.Fatal(err)
	}
	return lg
}

func findings(lg *LogReport, sev string) string {
	var out []string
	for _, f := range lg.Findings {
		if f.Severity == sev {
			out = append(out, f.Message)
		}
	}
	return strings.Join(out, "\n")
}

// TestRollbackWalksBack: a tag pushed outside modelgate (adopted), three
// promotions, then three rollbacks return each earlier target in turn; a
// fourth finds nothing earlier; the log lists all six records and
// verifies.
func TestRollbackWalksBack(t *testing.T) {
	e := newEnv(t, envOptions{required: 1})
	base := e.models[0]
	if err := e.store.Tag(e.ctx, testRepo, "prod", v1.Descriptor{Digest: base}); err != nil {
		t.Fatal(err)
	}
	for _, m := range e.models[1:4] {
		e.mustPromote(m)
	}
	want := []v1.Hash{e.models[2], e.models[1], base}
	for i, w := range want {
		dry, err := e.rollback(nil, true)
		if err != nil || dry.To != w.String() || e.current() != e.models[3-i].String() {
			t.Fatalf("dry run %d: %+v, %v; tag at %s", i, dry, err, e.current())
		}
		res, err := e.rollback(nil, false)
		if err != nil {
			t.Fatalf("rollback %d: %v", i, err)
		}
		if res.To != w.String() || e.current() != w.String() {
			t.Fatalf("rollback %d went to %s (tag %s), want %s", i, res.To, e.current(), w)
		}
	}
	_, err := e.rollback(nil, false)
	wantRefusal(t, err, errkind.BadInput, "nothing earlier to roll back to")

	lg := e.log("rita")
	if len(lg.Entries) != 6 || lg.Worst() != 0 {
		t.Fatalf("log: %d entries, worst %v, findings %+v", len(lg.Entries), lg.Worst(), lg.Findings)
	}
	kinds := ""
	for _, en := range lg.Entries {
		kinds += en.Record.Kind[:1]
	}
	if kinds != "rrrppp" {
		t.Errorf("record kinds newest first %q, want rrrppp", kinds)
	}
	if !strings.Contains(findings(lg, SeverityNote), "adopted") {
		t.Errorf("the adopted first target is not noted: %+v", lg.Findings)
	}

	// --to: any digest released before, nothing else.
	res, err := e.rollback(&e.models[3], false)
	if err != nil || e.current() != e.models[3].String() {
		t.Fatalf("rollback --to the newest release: %+v, %v", res, err)
	}
	never := e.pushVariant(9)
	_, err = e.rollback(&never, false)
	wantRefusal(t, err, errkind.BadInput, "was never released on tiny-encoder:prod")
	// A plain rollback undoes the --to jump.
	if res, err := e.rollback(nil, false); err != nil || res.To != base.String() {
		t.Errorf("rollback after --to: %+v, %v", res, err)
	}
	if lg := e.log("rita"); len(lg.Entries) != 8 || lg.Worst() != 0 {
		t.Errorf("log after --to: %d entries, %+v", len(lg.Entries), lg.Findings)
	}
}

// TestLogDetectsDamage: every inconsistent state is reported, never
// silently passed.
func TestLogDetectsDamage(t *testing.T) {
	setup := func(t *testing.T) (*env, *LogReport) {
		e := newEnv(t, envOptions{})
		for _, m := range e.models[:3] {
			e.mustPromote(m)
		}
		lg := e.log("rita")
		if len(lg.Entries) != 3 || lg.Worst() != 0 {
			t.Fatalf("clean log: %+v", lg)
		}
		return e, lg
	}
	t.Run("record edited in the store", func(t *testing.T) {
		e, lg := setup(t)
		mid, _ := registry.ParseDigest(lg.Entries[1].Digest)
		p := e.blobPath(mid)
		b, _ := os.ReadFile(p)
		os.WriteFile(p, []byte(strings.Replace(string(b), "release.v1", "releasf.v1", 1)), 0o644)
		lg = e.log()
		if lg.Worst() != errkind.Integrity || !strings.Contains(findings(lg, SeverityDamage), "missing, edited or invalid") {
			t.Errorf("edited record: %+v", lg.Findings)
		}
		_, err := e.rollback(nil, false) // the head is fine; rollback reads the edited one
		wantRefusal(t, err, errkind.Integrity)
	})
	t.Run("record missing", func(t *testing.T) {
		e, lg := setup(t)
		old, _ := registry.ParseDigest(lg.Entries[2].Digest)
		os.Remove(e.blobPath(old))
		lg = e.log()
		if lg.Worst() != errkind.Integrity || !strings.Contains(findings(lg, SeverityDamage), "missing") {
			t.Errorf("missing record: %+v", lg.Findings)
		}
	})
	t.Run("record re-signed by another key", func(t *testing.T) {
		e, lg := setup(t)
		// mallory rewrites the newest record (to a model never gated) and
		// moves both tags: the chain links and her signature verify, but
		// her key is not trusted.
		head, _ := registry.ParseDigest(lg.Head)
		lr, err := readRecord(e.ctx, e.store, testRepo, head, prodRef.String())
		if err != nil {
			t.Fatal(err)
		}
		forged := lr.Record
		forged.To = e.models[3].String()
		released, _ := lr.releasedList(e.ctx, e.store, testRepo)
		d, err := writeRecord(e.ctx, e.store, testRepo, &forged, appendNew(released[:len(released)-1], forged.To), nil, e.keys["mallory"], lr.policyLayer())
		if err != nil {
			t.Fatal(err)
		}
		_, to, _ := e.store.Manifest(e.ctx, testRepo, e.models[3])
		storetest.ForceTag(e.ctx, e.store, testRepo, "prod", to)
		storetest.ForceTag(e.ctx, e.store, testRepo, "release-prod", d)
		lg = e.log("rita")
		// Her key is untrusted, and the record she replaced had been
		// released (its committed marker), so dropping it from
		// the chain is damage.
		if lg.Worst() != errkind.Integrity || !strings.Contains(findings(lg, SeverityUntrusted), "mallory") ||
			!strings.Contains(findings(lg, SeverityDamage), "no longer in the chain") {
			t.Errorf("forged record: %+v", lg.Findings)
		}
	})
	t.Run("announced release overwritten by a racing one", func(t *testing.T) {
		// What a plain OCI registry allows: promote A saw both tag moves
		// succeed (it reported success and left its marker), then a racing
		// promote B, made from the same parent, overwrote both tags. Both
		// chains verify on their own; A's marker is what exposes the race.
		e, lg := setup(t)
		headA, _ := registry.ParseDigest(lg.Head)
		lr, err := readRecord(e.ctx, e.store, testRepo, headA, prodRef.String())
		if err != nil {
			t.Fatal(err)
		}
		recB := lr.Record
		recB.To = e.models[3].String()
		recB.Reason = "the racing promote"
		released, _ := lr.releasedList(e.ctx, e.store, testRepo)
		dB, err := writeRecord(e.ctx, e.store, testRepo, &recB, appendNew(released[:len(released)-1], recB.To), nil, e.keys["rita"], lr.policyLayer())
		if err != nil {
			t.Fatal(err)
		}
		_, to, _ := e.store.Manifest(e.ctx, testRepo, e.models[3])
		storetest.ForceTag(e.ctx, e.store, testRepo, "prod", to)
		storetest.ForceTag(e.ctx, e.store, testRepo, "release-prod", dB)
		if err := markCommitted(e.ctx, e.store, &state{target: prodRef}, dB); err != nil {
			t.Fatal(err)
		}
		lg = e.log("rita")
		dmg := findings(lg, SeverityDamage)
		if lg.Worst() != errkind.Integrity || !strings.Contains(dmg, "no longer in the chain") {
			t.Errorf("lost race not exposed: %+v", lg.Findings)
		}
		for _, f := range lg.Findings {
			if f.Severity == SeverityDamage && f.Where != headA.String() {
				t.Errorf("damage reported at %s, want only the overwritten record %s", f.Where, headA)
			}
		}
		// A registry lists its manifests by digest alone (no type, no
		// annotations): the overwritten record must be found all the same.
		lg, err = Log(e.ctx, digestsOnly{e.store}, prodRef, LogOptions{Trusted: []PublicKey{e.keys["rita"].Trusted()}})
		if err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(findings(lg, SeverityDamage), "no longer in the chain") {
			t.Errorf("a store listing digests alone: lost race not exposed: %+v", lg.Findings)
		}
	})
	t.Run("signature altered", func(t *testing.T) {
		e, lg := setup(t)
		head, _ := registry.ParseDigest(lg.Head)
		lr, _ := readRecord(e.ctx, e.store, testRepo, head, prodRef.String())
		lr.Record.Reason = "edited after signing"
		st, _ := newStatement(testRepo, lr.Record.To, PredicateRelease, lr.Record)
		body, _ := Sign(e.ctx, e.keys["mallory"], st)
		// Keep rita's signature on mallory's payload.
		var good, bad map[string]any
		orig, _ := artifact.ReadBlob(e.ctx, e.store, testRepo, lr.st.Art.Manifest.Layers[0], 1<<20)
		jsonUnmarshal(t, orig, &good)
		jsonUnmarshal(t, body, &bad)
		bad["signatures"] = good["signatures"]
		env := jsonMarshal(t, bad)
		layers := []artifact.Blob{artifact.NewBlob(MediaTypeEnvelope, env, nil), {Desc: lr.released}}
		subject, _ := subjectOf(e.ctx, e.store, testRepo, e.models[2])
		d, err := putArtifact(e.ctx, e.store, testRepo, ArtifactTypeRelease, layers, subject, nil)
		if err != nil {
			t.Fatal(err)
		}
		storetest.ForceTag(e.ctx, e.store, testRepo, "release-prod", d)
		lg = e.log()
		if lg.Worst() != errkind.Integrity || !strings.Contains(findings(lg, SeverityDamage), "does not verify") {
			t.Errorf("altered signature: %+v", lg.Findings)
		}
	})
	t.Run("tag moved outside modelgate", func(t *testing.T) {
		e, _ := setup(t)
		_, d, _ := e.store.Manifest(e.ctx, testRepo, e.models[3])
		storetest.ForceTag(e.ctx, e.store, testRepo, "prod", d)
		lg := e.log()
		if lg.Worst() != errkind.Integrity || !strings.Contains(findings(lg, SeverityDamage), "moved outside modelgate") {
			t.Errorf("external move: %+v", lg.Findings)
		}
		_, err := e.promote(e.models[1], "rita")
		wantRefusal(t, err, errkind.Integrity, "moved outside modelgate")
		res, err := e.rollback(nil, false)
		if err != nil || !res.External || res.To != e.models[2].String() || e.current() != e.models[2].String() {
			t.Fatalf("rollback after an external move: %+v, %v", res, err)
		}
		lg = e.log("rita")
		if lg.Worst() != 0 || !strings.Contains(findings(lg, SeverityNote), "moved outside modelgate") {
			t.Errorf("after the repair: %+v", lg.Findings)
		}
	})
	t.Run("tag deleted", func(t *testing.T) {
		e, _ := setup(t)
		if err := e.store.Untag(e.ctx, testRepo, "prod"); err != nil {
			t.Fatal(err)
		}
		if lg := e.log(); lg.Worst() != errkind.Integrity {
			t.Errorf("deleted tag: %+v", lg.Findings)
		}
	})
	t.Run("head pointer deleted", func(t *testing.T) {
		e, _ := setup(t)
		if err := e.store.Untag(e.ctx, testRepo, "release-prod"); err != nil {
			t.Fatal(err)
		}
		lg := e.log()
		if lg.Worst() != errkind.Integrity || !strings.Contains(findings(lg, SeverityDamage), "no release log") ||
			!strings.Contains(findings(lg, SeverityNote), "never took effect") {
			t.Errorf("deleted head pointer: %+v", lg.Findings)
		}
	})
}

// TestInterruptedRelease: a crash after the model tag moved but before the
// head pointer did is reported by log and completed by the next promote or
// rollback; a crash before the tag moved leaves a record that never took
// effect.
func TestInterruptedRelease(t *testing.T) {
	e := newEnv(t, envOptions{})
	e.mustPromote(e.models[0])
	e.mustPromote(e.models[1])
	// Replay promote's writes up to the crash point.
	s, err := readState(e.ctx, e.store, prodRef)
	if err != nil {
		t.Fatal(err)
	}
	released, _ := s.head.releasedList(e.ctx, e.store, testRepo)
	rep := e.report(e.models[2], e.models[1], e.pol, checks.VerdictPass, e.keys["ci"])
	rec := &Record{Kind: KindPromote, Target: prodRef.String(), From: s.current(), To: e.models[2].String(), Report: rep.String(),
		Time: e.now.Format("2006-01-02T15:04:05Z"), Previous: s.head.Digest.String(), PolicyDigest: e.pol.Digest(),
		Restore: &Restore{Target: s.current(), Record: s.head.Digest.String()}, Policy: s.head.Record.Policy}
	d, err := writeRecord(e.ctx, e.store, testRepo, rec, appendNew(released, rec.To), nil, e.keys["rita"], s.head.policyLayer())
	if err != nil {
		t.Fatal(err)
	}
	lg := e.log()
	if lg.Worst() != 0 || !strings.Contains(findings(lg, SeverityNote), "never took effect") {
		t.Errorf("a record written before a crash: %+v", lg.Findings)
	}
	_, to, _ := e.store.Manifest(e.ctx, testRepo, e.models[2])
	if err := e.store.SwapTag(e.ctx, testRepo, "prod", e.models[1], to); err != nil {
		t.Fatal(err)
	}
	lg = e.log()
	if lg.Worst() != errkind.Integrity || !strings.Contains(findings(lg, SeverityDamage), "interrupted") {
		t.Errorf("interrupted release: %+v", lg.Findings)
	}
	dry, err := e.rollback(nil, true)
	if err != nil || dry.Pending != d.Digest.String() || dry.To != e.models[1].String() {
		t.Errorf("dry run over an interrupted release: %+v, %v", dry, err)
	}
	if lg2 := e.log(); lg2.Worst() != errkind.Integrity {
		t.Errorf("the dry run changed the store: %+v", lg2.Findings)
	}
	res, err := e.rollback(nil, false)
	if err != nil || res.Completed != d.Digest.String() || res.To != e.models[1].String() {
		t.Fatalf("rollback completing an interrupted release: %+v, %v", res, err)
	}
	if lg = e.log("rita"); lg.Worst() != 0 || len(lg.Entries) != 4 {
		t.Errorf("after completion: %d entries, %+v", len(lg.Entries), lg.Findings)
	}
}

// digestsOnly lists manifests as a registry does: digests, nothing else.
type digestsOnly struct{ *registry.Local }

func (d digestsOnly) Manifests(ctx context.Context, repo string) ([]v1.Descriptor, error) {
	ds, err := d.Local.Manifests(ctx, repo)
	for i := range ds {
		ds[i] = v1.Descriptor{Digest: ds[i].Digest}
	}
	return ds, err
}
