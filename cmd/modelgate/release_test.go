package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/policy"
)

// TestReleaseCommands drives keygen, gate --sign-key, approve, promote,
// rollback and log through the binary: a tag pushed outside modelgate is
// adopted, three promotions, refusals with their exit codes, three
// rollbacks back to each earlier target, a log of six verified records,
// and a log that exits 5 once the tag is moved outside modelgate or a
// record's bytes are edited.
func TestReleaseCommands(t *testing.T) {
	w := newReleaseWorld(t, 2)
	base := w.Push(0, "tiny-encoder:prod") // set before any release record
	var cands []string
	for i := 1; i <= 4; i++ {
		cands = append(cands, w.Push(i, ""))
	}

	// Refusals before anything is in place.
	wantExit(t, w.Approve("tiny-encoder:v1", "ana"), 4, "no gate report")
	w.Gate("tiny-encoder:v1")
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 4, "0 of the 2 approvals")
	wantExit(t, w.Approve("tiny-encoder:v1", "mallory"), 0, "will not count")
	wantExit(t, w.Approve("tiny-encoder:v1", "ana"), 0)
	wantExit(t, w.Approve("tiny-encoder:v1", "ana", "--comment", "once more"), 0)
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 4,
		"1 of the 2 approvals", "does not list as an approver", "each key counts once")
	wantExit(t, w.Approve("tiny-encoder:v1", "rita"), 0)
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 4, "self-approval")
	wantExit(t, w.Promote("tiny-encoder:v1"), 4, "sign with --key")

	// Three promotions.
	for i, c := range []string{"tiny-encoder:v1", "tiny-encoder:v2", "tiny-encoder:v3"} {
		if i > 0 {
			w.Gate(c)
		}
		w.Approve(c, "ana")
		w.Approve(c, "ben")
		r := w.Promote(c, "--key", w.Key("rita"), "--reason", "release "+c)
		wantExit(t, r, 0, "promoted tiny-encoder:prod", "approvals:   2 counted, 2 required")
		if w.Prod() != cands[i] {
			t.Fatalf("after promoting %s the tag points at %s", c, w.Prod())
		}
		if i == 0 { // v4 gated and approved against v1, then v2 replaces v1
			w.Gate("tiny-encoder:v4")
			w.Approve("tiny-encoder:v4", "ana")
			w.Approve("tiny-encoder:v4", "ben")
		}
	}
	wantExit(t, w.Promote("tiny-encoder:v3", "--key", w.Key("rita")), 0, "nothing to do")
	wantExit(t, w.Promote("tiny-encoder:v4", "--key", w.Key("rita")), 3, "made against another baseline", "gate again")

	// Three rollbacks, each to the earlier target; then nothing earlier.
	for _, want := range []string{cands[1], cands[0], base} {
		dry := mustMG(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "canary", "--dry-run")
		if !strings.Contains(dry.stdout, "would roll back") || !strings.Contains(dry.stdout, want) {
			t.Errorf("dry run: %s", dry.stdout)
		}
		mustMG(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "canary: fewer plays", "--key", w.Key("rita"))
		if got := w.Prod(); got != want {
			t.Fatalf("rollback went to %s, want %s", got, want)
		}
	}
	wantExit(t, mg(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "again"), 2, "nothing earlier")
	wantExit(t, mg(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "x", "--to", cands[3]), 2, "never released")
	wantExit(t, mg(t, w.Store, "rollback", "tiny-encoder:prod"), 2, "--reason")

	lg := mustMG(t, w.Store, "log", "tiny-encoder:prod", "--policy", w.Policy)
	if n := strings.Count(lg.stdout, "\n#"); n != 6 {
		t.Errorf("log lists %d records, want 6:\n%s", n, lg.stdout)
	}
	for _, s := range []string{"rollback", "promote", "canary: fewer plays", "signature ok", "adopted", "every record, signature and link verified"} {
		if !strings.Contains(lg.stdout, s) {
			t.Errorf("log lacks %q:\n%s", s, lg.stdout)
		}
	}
	var rep struct {
		Entries []struct {
			Digest string
			Record struct{ Kind, To string }
		}
	}
	if err := json.Unmarshal([]byte(mustMG(t, w.Store, "log", "--json", "tiny-encoder:prod").stdout), &rep); err != nil || len(rep.Entries) != 6 {
		t.Fatalf("log --json: %v, %d entries", err, len(rep.Entries))
	}
	// Unsigned records are reported as untrusted against a policy (exit 4).
	mustMG(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "unsigned", "--to", cands[2])
	wantExit(t, mg(t, w.Store, "log", "tiny-encoder:prod", "--policy", w.Policy), 4, "unsigned")
	mustMG(t, w.Store, "log", "tiny-encoder:prod")

	// push cannot move the guarded tag; someone who writes the store's
	// bytes can: log exits 5, promote refuses 5, rollback restores the
	// last released target.
	wantExit(t, mg(t, w.Store, "push", nameVariant(t, w.Dir, 4), "tiny-encoder:prod"), 4, "release log", "promote", "rollback")
	forceTag(t, w.Store, "tiny-encoder", "prod", cands[3])
	wantExit(t, mg(t, w.Store, "log", "tiny-encoder:prod"), 5, "moved outside modelgate")
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 5, "moved outside modelgate")
	wantExit(t, mg(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "undo a manual push"), 0, "moved outside modelgate")
	if w.Prod() != cands[2] {
		t.Errorf("after repairing rollback the tag points at %s", w.Prod())
	}
	mustMG(t, w.Store, "log", "tiny-encoder:prod")

	// A record's bytes edited in the store: log exits 5.
	old := rep.Entries[3].Digest
	p := filepath.Join(w.Store, "blobs", "sha256", strings.TrimPrefix(old, "sha256:"))
	b, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	os.Chmod(p, 0o644)
	if err := os.WriteFile(p, []byte(strings.Replace(string(b), "release", "relaese", 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	wantExit(t, mg(t, w.Store, "log", "tiny-encoder:prod"), 5, "does NOT verify", shortDigest(old)[7:])
}

// TestDemoReleaseStory: the demo ends with the release story and a log
// that verifies against the demo's policy; a second run keeps the log.
func TestDemoReleaseStory(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	work := filepath.Join(t.TempDir(), "work")
	r := mustMG(t, store, "demo", "--work", work)
	for _, s := range []string{
		"1. The baseline is released", "verdict: pass", "approved", "promoted promo-scorer:prod",
		"promo-scorer:cand-worse (built to fail holdout): gate fail", "contract: probes failed",
		"freeze:", "budget:", "refused, exit 1", "rolled back promo-scorer:prod",
		// The encoder scene: alone refused, naming the live scorer and the
		// command; then both released together, the scorer first.
		"refused, exit 4: promote refused: listener-encoder:prod's live encoder",
		"is consumed by promo-scorer:prod (scorer ",
		"`modelgate promote listener-encoder:v2 --to listener-encoder:prod --with SCORER-CANDIDATE=promo-scorer:prod",
		"released 2 tags together, in this order",
		"promoted promo-scorer:prod: ", "promoted listener-encoder:prod: ",
		"in one release with promo-scorer:prod",
		"its newest release moved 2 tags together; all of them go back, in one record",
		"5 record(s)", "every record, signature and link verified",
	} {
		if !strings.Contains(r.stdout, s) {
			t.Errorf("demo story lacks %q", s)
		}
	}
	if a, b := strings.Index(r.stdout, "promoted promo-scorer:prod: "), strings.Index(r.stdout, "promoted listener-encoder:prod: "); a > b {
		t.Errorf("the encoder moved before its scorer:\n%s", r.stdout)
	}
	pol := filepath.Join(work, "policies", "promo-scorer.yaml")
	lg := mustMG(t, store, "log", "promo-scorer:prod", "--policy", pol)
	if strings.Count(lg.stdout, "\n#") != 5 || !strings.Contains(lg.stdout, "in one release with listener-encoder:prod") {
		t.Errorf("log:\n%s", lg.stdout)
	}
	mustMG(t, store, "log", "listener-encoder:prod", "--policy", filepath.Join(work, "policies", "listener-encoder.yaml"))
	// The story ends where it began: the encoder's rollback took its
	// scorer back with it.
	tags := storeTags(t, store)
	if tags["promo-scorer:prod"] != tags["promo-scorer:baseline"] || tags["listener-encoder:prod"] != tags["listener-encoder:v1"] {
		t.Errorf("after the story: %v", tags)
	}
	r = mustMG(t, store, "demo", "--work", work)
	if !strings.Contains(r.stdout, "already ran on this store") {
		t.Errorf("second demo run:\n%s", r.stdout)
	}
}

// TestDemoPolicyKeyIDsStayStrings: a key id is 16 hex digits, so now and
// then one has no letter (or reads like 12e4...), and YAML takes a plain
// scalar of that form for a number (YAML 1.2.2, §10.3.2, the core
// schema's int and float). The demo's policy copy (and keygen's snippet)
// quote it; this demo run once failed on an id of digits.
func TestDemoPolicyKeyIDsStayStrings(t *testing.T) {
	work := t.TempDir()
	keys, err := demoKeys(filepath.Join(work, "keys"))
	if err != nil {
		t.Fatal(err)
	}
	keys["ana"].ID, keys["ben"].ID, keys["ci"].ID = "1234567890123456", "12e4567890123456", "0000000000000017"
	p, err := demoPolicy(work, keys)
	if err != nil {
		t.Fatalf("demo policy with digit-only key ids: %v", err)
	}
	pol, err := policy.Load(p)
	if err != nil {
		t.Fatal(err)
	}
	r, err := pol.Rule("promo-scorer:prod")
	if err != nil {
		t.Fatal(err)
	}
	if got := r.Approvals.Approvers[1].KeyID; got != "12e4567890123456" {
		t.Errorf("ben's key id reads back as %q", got)
	}
	if got := r.Approvals.ReportSigners[0].KeyID; got != "0000000000000017" {
		t.Errorf("ci's key id reads back as %q", got)
	}
	out := mustMG(t, filepath.Join(work, "store"), "keygen", "--out", filepath.Join(work, "sam"), "--name", "sam").stdout
	if !strings.Contains(out, `keyId: "`) {
		t.Errorf("keygen's policy snippet does not quote the key id:\n%s", out)
	}
}
