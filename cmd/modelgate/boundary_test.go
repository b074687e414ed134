package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
	"github.com/modelgate/modelgate/internal/release"
)

// The tests in this file reproduce, through the binary, ways around the
// release boundary that a careless or hostile colleague could take: a
// policy file of one's own, a key no policy lists, approvals that outlive
// a rollback. Each ran against the code before the policy was bound to
// the tag and failed there (the commands succeeded).

// firstRelease pushes variant 0 as tiny-encoder:prod and promotes variant 1
// over it, gated and approved by ana and ben, signed by rita: the first
// promote binds w.Policy to the tag. It returns the digests of 0 and 1.
func firstRelease(t *testing.T, w *releaseWorld) (string, string) {
	t.Helper()
	base := w.Push(0, "tiny-encoder:prod")
	v1 := w.Push(1, "")
	w.Gate("tiny-encoder:v1")
	wantExit(t, w.Approve("tiny-encoder:v1", "ana"), 0)
	wantExit(t, w.Approve("tiny-encoder:v1", "ben"), 0)
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 0, "promoted")
	return base, v1
}

// weakPolicy writes the release manager's own copy of the policy: no
// approvals required, no report signers.
func weakPolicy(t *testing.T, w *releaseWorld) string {
	t.Helper()
	p := filepath.Join(w.Dir, "my-policy.yaml")
	text := `schemaVersion: 1
name: tiny-release
rules:
  - target: tiny-encoder:prod
    kind: encoder
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
    approvals:
      required: 0
`
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

// TestOwnPolicyFileRefused: a release manager's own copy of the policy
// (required: 0, no report signers) is refused by gate, approve and
// promote (exit 4) with what it changes; the bound policy still works
// without --policy.
func TestOwnPolicyFileRefused(t *testing.T) {
	w := newReleaseWorld(t, 2)
	_, v1 := firstRelease(t, w)
	w.Push(2, "")
	weak := weakPolicy(t, w)

	wantExit(t, mg(t, w.Store, "gate", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--policy", weak), 4,
		"is not the policy bound to tiny-encoder:prod", "/rules/0/approvals/required: 2 → 0", "/rules/0/approvals/reportSigners: removed")
	wantExit(t, mg(t, w.Store, "approve", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--policy", weak, "--key", w.Key("ana")), 4, "not the policy bound")
	wantExit(t, mg(t, w.Store, "promote", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--policy", weak, "--key", w.Key("rita")), 4, "not the policy bound")
	if w.Prod() != v1 {
		t.Fatalf("prod moved to %s", w.Prod())
	}
	wantExit(t, mg(t, w.Store, "policy", "diff", "tiny-encoder:prod", weak), 1, "/rules/0/approvals/required: 2 → 0")
	wantExit(t, mg(t, w.Store, "policy", "diff", "tiny-encoder:prod", w.Policy), 0, "is the policy bound")

	// The bound policy, without --policy: the real rules apply.
	mustMG(t, w.Store, "gate", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--sign-key", w.Key("ci"))
	wantExit(t, mg(t, w.Store, "promote", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--key", w.Key("rita")), 4, "0 of the 2 approvals")
	mustMG(t, w.Store, "approve", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--key", w.Key("ana"))
	mustMG(t, w.Store, "approve", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--key", w.Key("ben"))
	wantExit(t, mg(t, w.Store, "promote", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--key", w.Key("rita")), 0, "2 counted, 2 required")
	mustMG(t, w.Store, "log", "tiny-encoder:prod")
	mustMG(t, w.Store, "log", "tiny-encoder:prod", "--policy", w.Policy)
	// --policy on log stays a cross-check.
	wantExit(t, mg(t, w.Store, "log", "tiny-encoder:prod", "--policy", weak), 4, "is not the policy bound", "required: 2 → 0")
}

// forgePromote writes, straight into the store, what a promotion with the
// weak policy leaves behind: a promote record from the tag's target to
// model to (released on the tag before), with no gate report and no
// approvals, signed by key, and moves both tags. It uses the store and
// signing APIs alone, as anyone with write access to the store could.
func forgePromote(t *testing.T, w *releaseWorld, to string, keyFile string) {
	t.Helper()
	ctx := context.Background()
	st, err := registry.OpenLocal(w.Store)
	if err != nil {
		t.Fatal(err)
	}
	key, err := release.LoadKey(keyFile)
	if err != nil {
		t.Fatal(err)
	}
	hd, err := st.Resolve(ctx, "tiny-encoder", "release-prod")
	if err != nil {
		t.Fatal(err)
	}
	head, err := artifact.ReadArtifact(ctx, st, registry.Ref{Repository: "tiny-encoder", Digest: hd.Digest})
	if err != nil {
		t.Fatal(err)
	}
	var rec map[string]any
	var layers []artifact.Blob
	for _, l := range head.Manifest.Layers {
		if l.MediaType == release.MediaTypeEnvelope {
			raw, err := artifact.ReadBlob(ctx, st, "tiny-encoder", l, 1<<20)
			if err != nil {
				t.Fatal(err)
			}
			env, err := release.ParseEnvelope(raw)
			if err != nil {
				t.Fatal(err)
			}
			if err := json.Unmarshal(env.Statement.Predicate, &rec); err != nil {
				t.Fatal(err)
			}
			continue
		}
		layers = append(layers, artifact.Blob{Desc: l}) // released index (and bound policy) as they are
	}
	from := rec["to"].(string)
	rec["kind"], rec["from"], rec["to"], rec["previous"] = "promote", from, to, hd.Digest.String()
	rec["restore"] = map[string]any{"target": from, "record": hd.Digest.String()}
	rec["reason"], rec["time"] = "my own policy", time.Now().UTC().Format(time.RFC3339)
	rec["by"] = map[string]any{"name": key.Name, "keyId": key.ID}
	rec["signerPublicKey"] = string(key.PublicPEM())
	delete(rec, "approvals")
	delete(rec, "gateReport")
	delete(rec, "ended")
	pred, _ := json.Marshal(rec)
	toHash, _ := registry.ParseDigest(to)
	stmt := &release.Statement{Type: release.StatementType, Subject: []release.Subject{{Name: "tiny-encoder", Digest: map[string]string{"sha256": toHash.Hex}}},
		PredicateType: release.PredicateRelease, Predicate: pred}
	env, err := release.Sign(ctx, key, stmt)
	if err != nil {
		t.Fatal(err)
	}
	envBlob := artifact.NewBlob(release.MediaTypeEnvelope, env, nil)
	empty := artifact.NewBlob("application/vnd.oci.empty.v1+json", []byte("{}"), nil)
	_, toDesc, err := st.Manifest(ctx, "tiny-encoder", toHash)
	if err != nil {
		t.Fatal(err)
	}
	subject := v1.Descriptor{MediaType: toDesc.MediaType, Size: toDesc.Size, Digest: toDesc.Digest}
	for _, b := range []artifact.Blob{empty, envBlob} {
		if err := st.PutBlob(ctx, "tiny-encoder", b.Desc.Digest, b.Desc.Size, bytes.NewReader(b.Bytes)); err != nil {
			t.Fatal(err)
		}
	}
	raw, err := artifact.BuildManifest(release.ArtifactTypeRelease, empty, append([]artifact.Blob{envBlob}, layers...), &subject,
		map[string]string{release.AnnotationTarget: "tiny-encoder:prod", release.AnnotationKind: "promote"})
	if err != nil {
		t.Fatal(err)
	}
	recDesc, err := st.PutManifest(ctx, "tiny-encoder", "application/vnd.oci.image.manifest.v1+json", raw)
	if err != nil {
		t.Fatal(err)
	}
	if err := storetest.ForceTag(ctx, st, "tiny-encoder", "prod", subject); err != nil {
		t.Fatal(err)
	}
	if err := storetest.ForceTag(ctx, st, "tiny-encoder", "release-prod", recDesc); err != nil {
		t.Fatal(err)
	}
}

// TestLogJudgesEachRecordByItsPolicy: a promotion with no gate report and
// no approvals, written into the store by a key the policy lists (what
// promoting with one's own policy file used to leave), verifies as a
// chain, but log judges it by the policy bound at that record: exit 4,
// with or without --policy.
func TestLogJudgesEachRecordByItsPolicy(t *testing.T) {
	w := newReleaseWorld(t, 2)
	base, _ := firstRelease(t, w)
	mustMG(t, w.Store, "log", "tiny-encoder:prod", "--policy", w.Policy)
	forgePromote(t, w, base, w.Key("rita"))
	if w.Prod() != base {
		t.Fatalf("the forged release did not move the tag")
	}
	for _, args := range [][]string{{"--policy", w.Policy}, nil} {
		r := mg(t, w.Store, append([]string{"log", "tiny-encoder:prod"}, args...)...)
		wantExit(t, r, 4, "0 of the 2 approvals the policy in force requires", "names no gate report", "not every record is allowed")
	}
}

// TestPolicyChangeIsApproved: changing the bound policy is a release-log
// event that needs the approvals of the policy in force, signed over the
// new policy, with self-approval judged against the signer of the change.
func TestPolicyChangeIsApproved(t *testing.T) {
	w := newReleaseWorld(t, 2)
	firstRelease(t, w)
	weak := weakPolicy(t, w)
	wantExit(t, mg(t, w.Store, "policy", "bind", "tiny-encoder:prod", "--policy", weak, "--key", w.Key("rita")), 4, "needs 2 approval(s)", "0 count")
	wantExit(t, mg(t, w.Store, "policy", "bind", "tiny-encoder:prod", "--policy", weak, "--key", w.Key("mallory")), 4, "forbids self-approval")
	for _, who := range []string{"rita", "ana", "mallory"} {
		wantExit(t, mg(t, w.Store, "policy", "approve", "tiny-encoder:prod", "--policy", weak, "--key", w.Key(who)), 0, "required: 2 → 0")
	}
	// rita's own approval does not count for her change; mallory is no approver.
	wantExit(t, mg(t, w.Store, "policy", "bind", "tiny-encoder:prod", "--policy", weak, "--key", w.Key("rita")), 4, "1 count", "self-approval", "does not list as an approver")
	mustMG(t, w.Store, "policy", "approve", "tiny-encoder:prod", "--policy", weak, "--key", w.Key("ben"))
	wantExit(t, mg(t, w.Store, "policy", "bind", "tiny-encoder:prod", "--policy", weak, "--key", w.Key("rita"), "--reason", "no approvals for the tiny encoder"), 0,
		"changed the policy of tiny-encoder:prod", "approvals: 2 counted, 2 required")
	var shown struct{ Digest string }
	if err := json.Unmarshal([]byte(mustMG(t, w.Store, "policy", "show", "--json", "tiny-encoder:prod").stdout), &shown); err != nil || shown.Digest == "" {
		t.Fatalf("policy show: %v", err)
	}
	lg := mustMG(t, w.Store, "log", "tiny-encoder:prod")
	if !strings.Contains(lg.stdout, "policy ") || !strings.Contains(lg.stdout, "every record, signature and link verified") {
		t.Errorf("log after a policy change:\n%s", lg.stdout)
	}
	// The new policy now governs: the weak file is the bound one.
	w.Push(2, "")
	mustMG(t, w.Store, "gate", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--policy", weak)
	wantExit(t, mg(t, w.Store, "promote", "tiny-encoder:v2", "--to", "tiny-encoder:prod", "--key", w.Key("rita")), 0, "promoted")
	mustMG(t, w.Store, "log", "tiny-encoder:prod")
}

// TestLegacyLogUpgrade: a tag whose release log was started before
// policies were bound is refused by promote until `policy bind` binds a
// policy; then the usual rules apply.
func TestLegacyLogUpgrade(t *testing.T) {
	w := newReleaseWorld(t, 0)
	base := w.Push(0, "")
	st, err := registry.OpenLocal(w.Store)
	if err != nil {
		t.Fatal(err)
	}
	bd, _ := registry.ParseDigest(base)
	if _, err := release.Initial(context.Background(), st, release.InitialRequest{Target: registry.Ref{Repository: "tiny-encoder", Tag: "prod"},
		To: bd, User: "setup", Reason: "an older modelgate"}); err != nil {
		t.Fatal(err)
	}
	w.Push(1, "")
	w.Gate("tiny-encoder:v1")
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 4, "from before policies were bound", "modelgate policy bind")
	wantExit(t, mg(t, w.Store, "policy", "bind", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key("rita")), 0, "its first policy")
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 0, "promoted")
	mustMG(t, w.Store, "log", "tiny-encoder:prod")
}

// releasersPolicy is the world's policy with who may release: rita's
// release key (a second key of hers) may promote, ben may roll back.
func releasersPolicy(t *testing.T, w *releaseWorld) {
	t.Helper()
	mustMG(t, w.Store, "keygen", "--out", filepath.Join(w.Dir, "rita-release"), "--name", "rita")
	b, err := os.ReadFile(w.Policy)
	if err != nil {
		t.Fatal(err)
	}
	text := string(b) + `    releasers:
      promote:
        - {name: rita, keyFile: rita-release.pub.pem}
      rollback:
        - {name: ben, keyFile: ben.pub.pem}
`
	if err := os.WriteFile(w.Policy, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
}

// TestWhoMayRelease: a promotion signed by a key no policy lists is
// refused, and self-approval is judged against the signer: rita's own
// approval does not count when she promotes, whichever of her keys signs.
func TestWhoMayRelease(t *testing.T) {
	t.Run("no releasers listed", func(t *testing.T) {
		w := newReleaseWorld(t, 2)
		w.Push(0, "tiny-encoder:prod")
		w.Push(1, "")
		w.Gate("tiny-encoder:v1")
		mustMG(t, w.Store, "approve", "tiny-encoder:v1", "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key("ana"))
		mustMG(t, w.Store, "approve", "tiny-encoder:v1", "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key("rita"))
		// rita signs with a key no policy lists: her approval would count.
		wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("mallory")), 4, "is not listed")
		wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 4, "1 of the 2 approvals", "self-approval")
	})
	t.Run("releasers listed", func(t *testing.T) {
		w := newReleaseWorld(t, 2)
		releasersPolicy(t, w)
		w.Push(0, "tiny-encoder:prod")
		v1 := w.Push(1, "")
		w.Gate("tiny-encoder:v1")
		for _, who := range []string{"ana", "rita"} {
			mustMG(t, w.Store, "approve", "tiny-encoder:v1", "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key(who))
		}
		wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("mallory")), 4, "not one the policy lets sign a promote")
		wantExit(t, w.Promote("tiny-encoder:v1"), 4, "sign with --key")
		wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("ben")), 4, "not one the policy lets sign a promote")
		// Her release key is another key, but the policy names it rita.
		wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita-release")), 4, "1 of the 2 approvals", "self-approval")
		mustMG(t, w.Store, "approve", "tiny-encoder:v1", "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key("ben"))
		wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita-release")), 0, "2 counted, 2 required")
		if w.Prod() != v1 {
			t.Fatalf("prod is %s", w.Prod())
		}
		for _, k := range []string{"", "mallory", "rita-release"} {
			args := []string{"rollback", "tiny-encoder:prod", "--reason", "canary"}
			if k != "" {
				args = append(args, "--key", w.Key(k))
			}
			wantExit(t, mg(t, w.Store, args...), 4, "rollback of tiny-encoder:prod")
		}
		wantExit(t, mg(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "canary", "--key", w.Key("ben")), 0, "rolled back")
		mustMG(t, w.Store, "log", "tiny-encoder:prod")
	})
}

// TestRollbackEndsApprovals: after on-call rolls a release back, the gate
// report and approvals that led to it no longer count; a new gate report
// and new approvals do.
func TestRollbackEndsApprovals(t *testing.T) {
	w := newReleaseWorld(t, 2)
	base, v1 := firstRelease(t, w)
	mustMG(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "canary: fewer plays", "--key", w.Key("rita"))
	if w.Prod() != base {
		t.Fatalf("rollback left prod at %s", w.Prod())
	}
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 4, "rolled back", "canary: fewer plays", "gate and approve it again")
	wantExit(t, w.Approve("tiny-encoder:v1", "ana"), 4, "rolled back")
	w.Gate("tiny-encoder:v1")
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 4, "0 of the 2 approvals", "ended by the rollback")
	w.Approve("tiny-encoder:v1", "ana")
	w.Approve("tiny-encoder:v1", "ben")
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 0, "2 counted")
	if w.Prod() != v1 {
		t.Fatalf("prod is %s", w.Prod())
	}
	mustMG(t, w.Store, "log", "tiny-encoder:prod", "--policy", w.Policy)
}
