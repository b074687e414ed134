package main

import (
	"encoding/json"
	"encoding/pem"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/policy"
)

// releaseWorld is a store with tiny encoder variants, keys and a policy
// for tiny-encoder:prod, driven through the built binary.
type releaseWorld struct {
	t      *testing.T
	store  string
	dir    string
	policy string
	ids    map[string]string
}

// nameVariant writes the tiny encoder under another spec name: same
// weights and probes, another digest.
func nameVariant(t *testing.T, root string, i int) string {
	t.Helper()
	m := fixture.EncoderModel()
	m.Spec.Name = fmt.Sprintf("tiny-listener-encoder-%02d", i)
	dir := filepath.Join(root, m.Spec.Name)
	if err := modeldir.Write(dir, m); err != nil {
		t.Fatal(err)
	}
	return dir
}

func newReleaseWorld(t *testing.T, required int) *releaseWorld {
	t.Helper()
	return newReleaseWorldAt(t, required, filepath.Join(t.TempDir(), "store"))
}

// newReleaseWorldAt is newReleaseWorld on the store at location store.
func newReleaseWorldAt(t *testing.T, required int, store string) *releaseWorld {
	t.Helper()
	w := &releaseWorld{t: t, store: store, dir: t.TempDir(), ids: map[string]string{}}
	for _, n := range []string{"ana", "ben", "rita", "ci", "mallory"} {
		var out struct{ KeyID, PrivateKey string }
		r := mustMG(t, w.store, "keygen", "--json", "--out", filepath.Join(w.dir, n))
		if err := json.Unmarshal([]byte(r.stdout), &out); err != nil || len(out.KeyID) != 16 {
			t.Fatalf("keygen --json: %v %q", err, r.stdout)
		}
		w.ids[n] = out.KeyID
		// The private key never reaches the output.
		b, _ := os.ReadFile(out.PrivateKey)
		blk, _ := pem.Decode(b)
		if blk == nil || strings.Contains(r.stdout+r.stderr, string(pem.EncodeToMemory(blk)[28:60])) {
			t.Fatalf("keygen printed key material or wrote no PEM")
		}
		if fi, _ := os.Stat(out.PrivateKey); fi.Mode().Perm() != 0o600 {
			t.Errorf("%s has mode %v", out.PrivateKey, fi.Mode().Perm())
		}
	}
	w.policy = filepath.Join(w.dir, "policy.yaml")
	text := fmt.Sprintf(`schemaVersion: 1
name: tiny-release
rules:
  - target: tiny-encoder:prod
    kind: encoder
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
    approvals:
      required: %d
      approvers:
        - {name: ana, keyFile: ana.pub.pem, keyId: "%s"}
        - {name: ben, keyFile: ben.pub.pem}
        - {name: rita, keyFile: rita.pub.pem}
      reportSigners:
        - {name: ci, keyFile: ci.pub.pem}
`, required, w.ids["ana"])
	if err := os.WriteFile(w.policy, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	return w
}

func (w *releaseWorld) key(n string) string { return filepath.Join(w.dir, n+".key.pem") }

// push pushes variant i as tiny-encoder:v<i> and returns its digest.
func (w *releaseWorld) push(i int, tag string) string {
	w.t.Helper()
	if tag == "" {
		tag = fmt.Sprintf("tiny-encoder:v%d", i)
	}
	return strings.TrimSpace(mustMG(w.t, w.store, "push", nameVariant(w.t, w.dir, i), tag).stdout)
}

func (w *releaseWorld) gate(cand string) {
	w.t.Helper()
	mustMG(w.t, w.store, "gate", cand, "--to", "tiny-encoder:prod", "--policy", w.policy, "--sign-key", w.key("ci"))
}

func (w *releaseWorld) approve(cand, who string, args ...string) result {
	return mg(w.t, w.store, append([]string{"approve", cand, "--to", "tiny-encoder:prod", "--policy", w.policy, "--key", w.key(who)}, args...)...)
}

func (w *releaseWorld) promote(cand string, args ...string) result {
	return mg(w.t, w.store, append([]string{"promote", cand, "--to", "tiny-encoder:prod", "--policy", w.policy}, args...)...)
}

func (w *releaseWorld) prod() string {
	w.t.Helper()
	var rows []lsRow
	if err := json.Unmarshal([]byte(mustMG(w.t, w.store, "ls", "--json").stdout), &rows); err != nil {
		w.t.Fatal(err)
	}
	for _, r := range rows {
		if r.Repository == "tiny-encoder" && r.Tag == "prod" {
			return r.Digest
		}
	}
	return ""
}

func wantExit(t *testing.T, r result, code int, fragments ...string) {
	t.Helper()
	if r.code != code {
		t.Errorf("exit %d, want %d\nstdout: %s\nstderr: %s", r.code, code, r.stdout, r.stderr)
	}
	for _, f := range fragments {
		if !strings.Contains(r.stdout+r.stderr, f) {
			t.Errorf("output lacks %q\nstdout: %s\nstderr: %s", f, r.stdout, r.stderr)
		}
	}
}

// TestReleaseCommands drives keygen, gate --sign-key, approve, promote,
// rollback and log through the binary: a tag pushed outside modelgate is
// adopted, three promotions, refusals with their exit codes, three
// rollbacks back to each earlier target, a log of six verified records,
// and a log that exits 5 once the tag is moved outside modelgate or a
// record's bytes are edited.
func TestReleaseCommands(t *testing.T) {
	w := newReleaseWorld(t, 2)
	base := w.push(0, "tiny-encoder:prod") // set before any release record
	var cands []string
	for i := 1; i <= 4; i++ {
		cands = append(cands, w.push(i, ""))
	}

	// Refusals before anything is in place.
	wantExit(t, w.approve("tiny-encoder:v1", "ana"), 4, "no gate report")
	w.gate("tiny-encoder:v1")
	wantExit(t, w.promote("tiny-encoder:v1", "--key", w.key("rita")), 4, "0 of the 2 approvals")
	wantExit(t, w.approve("tiny-encoder:v1", "mallory"), 0, "will not count")
	wantExit(t, w.approve("tiny-encoder:v1", "ana"), 0)
	wantExit(t, w.approve("tiny-encoder:v1", "ana", "--comment", "once more"), 0)
	wantExit(t, w.promote("tiny-encoder:v1", "--key", w.key("rita")), 4,
		"1 of the 2 approvals", "does not list as an approver", "each key counts once")
	wantExit(t, w.approve("tiny-encoder:v1", "rita"), 0)
	wantExit(t, w.promote("tiny-encoder:v1", "--key", w.key("rita")), 4, "self-approval")
	wantExit(t, w.promote("tiny-encoder:v1"), 4, "sign with --key")

	// Three promotions.
	for i, c := range []string{"tiny-encoder:v1", "tiny-encoder:v2", "tiny-encoder:v3"} {
		if i > 0 {
			w.gate(c)
		}
		w.approve(c, "ana")
		w.approve(c, "ben")
		r := w.promote(c, "--key", w.key("rita"), "--reason", "release "+c)
		wantExit(t, r, 0, "promoted tiny-encoder:prod", "approvals:   2 counted, 2 required")
		if w.prod() != cands[i] {
			t.Fatalf("after promoting %s the tag points at %s", c, w.prod())
		}
		if i == 0 { // v4 gated and approved against v1, then v2 replaces v1
			w.gate("tiny-encoder:v4")
			w.approve("tiny-encoder:v4", "ana")
			w.approve("tiny-encoder:v4", "ben")
		}
	}
	wantExit(t, w.promote("tiny-encoder:v3", "--key", w.key("rita")), 0, "nothing to do")
	wantExit(t, w.promote("tiny-encoder:v4", "--key", w.key("rita")), 3, "made against another baseline", "gate again")

	// Three rollbacks, each to the earlier target; then nothing earlier.
	for _, want := range []string{cands[1], cands[0], base} {
		dry := mustMG(t, w.store, "rollback", "tiny-encoder:prod", "--reason", "canary", "--dry-run")
		if !strings.Contains(dry.stdout, "would roll back") || !strings.Contains(dry.stdout, want) {
			t.Errorf("dry run: %s", dry.stdout)
		}
		mustMG(t, w.store, "rollback", "tiny-encoder:prod", "--reason", "canary: fewer plays", "--key", w.key("rita"))
		if got := w.prod(); got != want {
			t.Fatalf("rollback went to %s, want %s", got, want)
		}
	}
	wantExit(t, mg(t, w.store, "rollback", "tiny-encoder:prod", "--reason", "again"), 2, "nothing earlier")
	wantExit(t, mg(t, w.store, "rollback", "tiny-encoder:prod", "--reason", "x", "--to", cands[3]), 2, "never released")
	wantExit(t, mg(t, w.store, "rollback", "tiny-encoder:prod"), 2, "--reason")

	lg := mustMG(t, w.store, "log", "tiny-encoder:prod", "--policy", w.policy)
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
	if err := json.Unmarshal([]byte(mustMG(t, w.store, "log", "--json", "tiny-encoder:prod").stdout), &rep); err != nil || len(rep.Entries) != 6 {
		t.Fatalf("log --json: %v, %d entries", err, len(rep.Entries))
	}
	// Unsigned records are reported as untrusted against a policy (exit 4).
	mustMG(t, w.store, "rollback", "tiny-encoder:prod", "--reason", "unsigned", "--to", cands[2])
	wantExit(t, mg(t, w.store, "log", "tiny-encoder:prod", "--policy", w.policy), 4, "unsigned")
	mustMG(t, w.store, "log", "tiny-encoder:prod")

	// push cannot move the guarded tag; someone who writes the store's
	// bytes can: log exits 5, promote refuses 5, rollback restores the
	// last released target.
	wantExit(t, mg(t, w.store, "push", nameVariant(t, w.dir, 4), "tiny-encoder:prod"), 4, "release log", "promote", "rollback")
	forceTag(t, w.store, "tiny-encoder", "prod", cands[3])
	wantExit(t, mg(t, w.store, "log", "tiny-encoder:prod"), 5, "moved outside modelgate")
	wantExit(t, w.promote("tiny-encoder:v1", "--key", w.key("rita")), 5, "moved outside modelgate")
	wantExit(t, mg(t, w.store, "rollback", "tiny-encoder:prod", "--reason", "undo a manual push"), 0, "moved outside modelgate")
	if w.prod() != cands[2] {
		t.Errorf("after repairing rollback the tag points at %s", w.prod())
	}
	mustMG(t, w.store, "log", "tiny-encoder:prod")

	// A record's bytes edited in the store: log exits 5.
	old := rep.Entries[3].Digest
	p := filepath.Join(w.store, "blobs", "sha256", strings.TrimPrefix(old, "sha256:"))
	b, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	os.Chmod(p, 0o644)
	if err := os.WriteFile(p, []byte(strings.Replace(string(b), "release", "relaese", 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	wantExit(t, mg(t, w.store, "log", "tiny-encoder:prod"), 5, "does NOT verify", shortDigest(old)[7:])
}

// TestConcurrentPromote: 16 promote processes, each with its own gated
// candidate against the same baseline, race for one tag on the local
// store: exactly one wins, the others exit 3, and the log is linear and
// verifies.
func TestConcurrentPromote(t *testing.T) {
	racePromotes(t, newReleaseWorld(t, 0), true)
}

// racePromotes races 16 promote processes of different gated candidates
// from one baseline. With a compare-and-swap store (exact true) exactly
// one wins, the others exit 3, and the log is linear and verifies.
// Without one (a plain OCI registry) it checks the guarantee that store
// gives: at least one wins, every other exits 3, and if more than one
// believed it won, `log` does not verify: the overwritten winner's record
// carries its committed marker but is out of the chain (the race is
// exposed, never silently lost).
func racePromotes(t *testing.T, w *releaseWorld, exact bool) {
	base := w.push(0, "tiny-encoder:prod")
	const n = 16
	cands := make([]string, n)
	for i := range cands {
		cands[i] = w.push(i+1, "")
		w.gate(fmt.Sprintf("tiny-encoder:v%d", i+1))
	}
	var wg sync.WaitGroup
	results := make([]result, n)
	for i := range n {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			results[i] = w.promote(fmt.Sprintf("tiny-encoder:v%d", i+1), "--key", w.key("rita"))
		}(i)
	}
	wg.Wait()
	if !exact {
		raceWithoutCAS(t, w, results, cands, base)
		return
	}
	winner, winners := -1, 0
	for i, r := range results {
		switch r.code {
		case 0:
			winners++
			if winner >= 0 {
				t.Errorf("promotes %d and %d both succeeded", winner, i)
			}
			winner = i
		case 3:
		default:
			t.Errorf("promote %d: exit %d, want 0 or 3: %s", i, r.code, r.stderr)
		}
	}
	if winner < 0 {
		t.Fatal("no promote succeeded")
	}
	t.Logf("%d of %d promotes won, the others exited 3", winners, len(results))
	if got := w.prod(); got != cands[winner] {
		t.Errorf("the tag points at %s, the winner promoted %s", got, cands[winner])
	}
	var rep struct {
		Entries  []struct{ Record struct{ From, To string } }
		Findings []struct{ Severity, Message string }
	}
	r := mustMG(t, w.store, "log", "--json", "tiny-encoder:prod", "--policy", w.policy)
	if err := json.Unmarshal([]byte(r.stdout), &rep); err != nil {
		t.Fatal(err)
	}
	if len(rep.Entries) != 1 || rep.Entries[0].Record.To != cands[winner] {
		t.Errorf("log: %+v", rep.Entries)
	}
	for _, f := range rep.Findings {
		if f.Severity != "note" {
			t.Errorf("finding: %+v", f)
		}
	}
}

// raceWithoutCAS checks what a store without compare-and-swap on tags
// guarantees after racing promotes (an OCI registry): no race is lost
// silently. Each promote exits 0 (it believes it won), 3 (it saw the tag
// move) or 5 (it saw the release log disagree with the tag mid-race); and
// either the outcome is consistent — `log` verifies, exactly one promote
// won, and the tag points at its candidate — or `log` does not verify,
// exposing the race.
func raceWithoutCAS(t *testing.T, w *releaseWorld, results []result, cands []string, base string) {
	t.Helper()
	winner, winners := -1, 0
	for i, r := range results {
		switch r.code {
		case 0:
			winner, winners = i, winners+1
		case 3, 5:
		default:
			t.Errorf("promote %d: exit %d, want 0, 3 or 5: %s", i, r.code, r.stderr)
		}
	}
	lg := mg(t, w.store, "log", "tiny-encoder:prod", "--policy", w.policy)
	if lg.code != 0 {
		t.Logf("%d promote(s) believed they won; log exposes the race (exit %d)", winners, lg.code)
		return
	}
	if winners == 0 && w.prod() == base {
		t.Logf("no promote won; the tag is unchanged and log verifies")
		return
	}
	if winners != 1 {
		t.Fatalf("%d promotes believed they won and log still verifies: a lost race went unnoticed", winners)
	}
	if got := w.prod(); got != cands[winner] {
		t.Fatalf("log verifies but the tag points at %s, not the winner's %s", got, cands[winner])
	}
	t.Logf("1 of %d promotes won; the outcome is consistent and log verifies", len(results))
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
