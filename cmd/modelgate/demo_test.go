package main

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// TestDemo runs the README's first command against a temporary store: the
// scenario is pushed, the production tags point at the baselines, and the
// store verifies clean. A second run is idempotent.
func TestDemo(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	work := filepath.Join(t.TempDir(), "work")
	r := mustMG(t, store, "demo", "--work", work)
	for _, s := range []string{"promo-scorer:cand-better", "promo-scorer:cand-shuffled-vocab", "promo-holdout:v1", "promo-scorer:prod"} {
		if !strings.Contains(r.stdout, s) {
			t.Errorf("demo output lacks %s", s)
		}
	}
	var rows []lsRow
	if err := json.Unmarshal([]byte(mustMG(t, store, "ls", "--json").stdout), &rows); err != nil {
		t.Fatal(err)
	}
	tags := map[string]string{}
	for _, row := range rows {
		tags[row.Repository+":"+row.Tag] = row.Digest
	}
	if tags["promo-scorer:prod"] == "" || tags["promo-scorer:prod"] != tags["promo-scorer:baseline"] {
		t.Errorf("promo-scorer:prod = %q, baseline = %q", tags["promo-scorer:prod"], tags["promo-scorer:baseline"])
	}
	if tags["listener-encoder:prod"] != tags["listener-encoder:v1"] {
		t.Errorf("listener-encoder:prod = %q, v1 = %q", tags["listener-encoder:prod"], tags["listener-encoder:v1"])
	}
	mustMG(t, store, "verify")
	// show lists what the story wrote about the promoted candidate: its
	// passing report for promo-scorer:prod, two approvals, the release.
	var d struct {
		Referrers []struct{ Kind, Target, Verdict, Signer string }
	}
	if err := json.Unmarshal([]byte(mustMG(t, store, "show", "promo-scorer:cand-better", "--json").stdout), &d); err != nil {
		t.Fatal(err)
	}
	count := map[string]int{}
	for _, r := range d.Referrers {
		if r.Target == "promo-scorer:prod" && r.Signer != "" && (r.Kind != "report" || r.Verdict == "pass") {
			count[r.Kind]++
		}
	}
	if count["report"] < 1 || count["approval"] < 2 || count["release"] < 1 {
		t.Errorf("show lists %+v; want a passing signed report, two approvals and a release record for promo-scorer:prod", d.Referrers)
	}
	if out := mustMG(t, store, "show", "promo-scorer:cand-better").stdout; !strings.Contains(out, "reports, approvals and records:") {
		t.Errorf("show prints no reports and approvals:\n%s", out)
	}
	before := countBlobs(t, store)
	mustMG(t, store, "demo", "--work", work)
	if after := countBlobs(t, store); after != before {
		t.Errorf("a second demo run wrote %d new blobs", after-before)
	}
}

// TestGateCommand runs the gate from the CLI over the demo scenario: exit
// codes, the stored report (a referrer of the candidate), the HTML page.
func TestGateCommand(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	work := filepath.Join(t.TempDir(), "work")
	mustMG(t, store, "demo", "--work", work)
	// The demo's first release bound its copy of the policy (with the
	// demo's keys) to promo-scorer:prod: the gate judges by it.
	pol := filepath.Join(work, "policies", "promo-scorer.yaml")
	html := filepath.Join(t.TempDir(), "report.html")
	r := mustMG(t, store, "gate", "promo-scorer:cand-better", "--to", "promo-scorer:prod", "--policy", pol, "--html", html)
	if !strings.Contains(r.stdout, "verdict: pass") {
		t.Errorf("gate output:\n%s", r.stdout)
	}
	// The file the repository ships is another policy: refused, exit 4.
	repoPol := filepath.Join("..", "..", "policies", "promo-scorer.yaml")
	if r := mg(t, store, "gate", "promo-scorer:cand-better", "--to", "promo-scorer:prod", "--policy", repoPol); r.code != 4 || !strings.Contains(r.stderr, "not the policy bound") {
		t.Errorf("gate with another policy file: exit %d\n%s", r.code, r.stderr)
	}
	page, err := os.ReadFile(html)
	if err != nil || !strings.Contains(string(page), "<svg") {
		t.Errorf("HTML report missing or without plots (%v)", err)
	}
	// The report is stored as a referrer of the candidate.
	st, err := registry.OpenLocal(store)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	cd, err := st.Resolve(ctx, "promo-scorer", "cand-better")
	if err != nil {
		t.Fatal(err)
	}
	all, err := st.Referrers(ctx, "promo-scorer", cd.Digest, "application/vnd.modelgate.report.v1")
	if err != nil {
		t.Fatal(err)
	}
	p, err := policy.Load(pol)
	if err != nil {
		t.Fatal(err)
	}
	var refs []v1.Descriptor // the demo's own story gated it too, signed by its CI key
	for _, d := range all {
		if d.Annotations["dev.modelgate.policy.digest"] == p.Digest() {
			refs = append(refs, d)
		}
	}
	if len(refs) != 2 {
		t.Fatalf("reports of the candidate under %s: %v", pol, refs)
	}
	rep, err := checks.ReadReport(ctx, st, "promo-scorer", refs[0].Digest)
	if err != nil || rep.Verdict != "pass" || rep.Candidate.Digest != cd.Digest.String() {
		t.Errorf("stored report: %+v, %v", rep, err)
	}

	// A failing gate exits 1 and says why; --json gives the report.
	r = mg(t, store, "gate", "--json", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", pol, "--no-push")
	if r.code != 1 {
		t.Fatalf("worse candidate: exit %d\n%s", r.code, r.stderr)
	}
	var out struct {
		Report checks.Report `json:"report"`
	}
	if err := json.Unmarshal([]byte(r.stdout), &out); err != nil || out.Report.Verdict != "fail" || len(out.Report.Reasons) == 0 {
		t.Errorf("gate --json: %v %+v", err, out.Report.Reasons)
	}
	// Sharded: two shard runs store their sums; --merge gives the same
	// holdout line as one run.
	single := mg(t, store, "gate", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", pol, "--no-push")
	// Shard 2 runs where only the policy file is mounted (its key files
	// are not there): it runs the policy bound to the tag, so --merge finds
	// both shards under the same policy digest.
	mounted := filepath.Join(t.TempDir(), "promo-scorer.yaml")
	raw, err := os.ReadFile(pol)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(mounted, raw, 0o644); err != nil {
		t.Fatal(err)
	}
	for sh, file := range map[string]string{"1/2": pol, "2/2": mounted} {
		r := mustMG(t, store, "gate", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", file, "--shard", sh)
		if !strings.HasPrefix(r.stdout, "sha256:") {
			t.Errorf("--shard %s printed %q", sh, r.stdout)
		}
		if file == mounted && !strings.Contains(r.stderr, "the shard runs the bound policy") {
			t.Errorf("--shard %s without the key files: stderr %q", sh, r.stderr)
		}
	}
	merged := mg(t, store, "gate", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", pol, "--merge", "--no-push")
	holdoutLine := func(out string) string {
		for _, l := range strings.Split(out, "\n") {
			if strings.Contains(l, "holdout ") && strings.Contains(l, "log loss") {
				return strings.TrimSuffix(l, " (merged from 2 shards)")
			}
		}
		return ""
	}
	if merged.code != 1 || holdoutLine(merged.stdout) == "" || holdoutLine(merged.stdout) != holdoutLine(single.stdout) {
		t.Errorf("merged shards (exit %d):\n%s\nsingle run:\n%s", merged.code, merged.stdout, single.stdout)
	}
	// Bad input exits 2.
	for _, args := range [][]string{
		{"gate", "promo-scorer:cand-better", "--to", "promo-scorer:prod", "--policy", pol, "--shard", "3/2"},
		{"gate", "promo-scorer:cand-better", "--to", "promo-scorer:staging"}, // no release log, no --policy
		{"gate", "promo-scorer:cand-better", "--to", "promo-scorer:canary", "--policy", pol},
		{"gate", "promo-scorer:nope", "--to", "promo-scorer:prod", "--policy", pol},
		{"gate", "promo-scorer:cand-better", "--to", "promo-scorer:prod", "--policy", "missing.yaml"},
	} {
		if r := mg(t, store, args...); r.code != 2 {
			t.Errorf("%v: exit %d, want 2: %s", args, r.code, r.stderr)
		}
	}
	mustMG(t, store, "verify")
}

// TestDemoWorkBelongsToItsStore: demo --store DIR keeps its work folder
// (private keys included) beside DIR, not beside the default store, and its
// "Try:" lines name the store.
func TestDemoWorkBelongsToItsStore(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the demo")
	}
	data := t.TempDir()
	t.Setenv("XDG_DATA_HOME", data)
	store := filepath.Join(t.TempDir(), "podcast store")
	r := mustMG(t, "", "demo", "--store", store)
	if _, err := os.Stat(filepath.Join(store+".demo", "keys")); err != nil {
		t.Errorf("the work folder is not beside the store: %v", err)
	}
	if _, err := os.Stat(filepath.Join(data, "modelgate", "demo")); err == nil {
		t.Errorf("demo --store wrote the default store's work folder %s", filepath.Join(data, "modelgate", "demo"))
	}
	for _, want := range []string{"modelgate --store '" + store + "' show promo-scorer:cand-better", "modelgate --store '" + store + "' verify"} {
		if !strings.Contains(r.stdout, want) {
			t.Errorf("the Try lines lack %q:\n%s", want, r.stdout[strings.LastIndex(r.stdout, "Try:"):])
		}
	}
}
