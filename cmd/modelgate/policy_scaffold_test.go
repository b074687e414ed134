package main

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// policy draft writes a policy policy check passes and gate reads; policy
// check exits 2 on a failing finding; draft does not overwrite a file.
func TestPolicyDraftAndCheck(t *testing.T) {
	dir := t.TempDir()
	store := filepath.Join(dir, "store")
	models := filepath.Join("..", "..", "testdata", "models")
	mustMG(t, store, "push", filepath.Join(models, "tiny-encoder"), "tiny-encoder:v1")
	mustMG(t, store, "push", filepath.Join(models, "tiny-scorer"), "promo-scorer:cand")
	vocab, err := os.ReadFile(filepath.Join(models, "tiny-scorer", "vocabulary.txt"))
	if err != nil {
		t.Fatal(err)
	}
	ids := strings.Fields(string(vocab))
	var b strings.Builder
	for i := 0; i < 150; i++ {
		fmt.Fprintf(&b, `{"items":[%q,%q],"values":[%d,%d],"listener_tenure":%g,"show_age":%g,"label":%d}`+"\n",
			ids[i%len(ids)], ids[(i*7+3)%len(ids)], 1+i%5, 3+i%4, float64(i%10)/10, float64(i%3)/3, i%4%2)
	}
	hold := filepath.Join(dir, "holdout.jsonl")
	if err := os.WriteFile(hold, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	mustMG(t, store, "push", "--kind", "holdout", hold, "promo-holdout:v1")
	mustMG(t, "", "keygen", "--out", filepath.Join(dir, "ana"), "--name", "ana")

	pol := filepath.Join(dir, "policy.yaml")
	r := mustMG(t, store, "policy", "draft", "promo-scorer:prod", "--from", "promo-scorer:cand",
		"--approver", "ana="+filepath.Join(dir, "ana.pub.pem"), "--out", pol)
	if strings.TrimSpace(r.stdout) != pol {
		t.Fatalf("draft --out printed %q", r.stdout)
	}
	if r := mg(t, store, "policy", "draft", "promo-scorer:prod", "--from", "promo-scorer:cand", "--out", pol); r.code != 3 {
		t.Fatalf("draft over an existing file: exit %d, want 3", r.code)
	}
	var rep struct {
		Failed int `json:"failed"`
		Rules  []struct {
			Settings []struct{ Path, Source string } `json:"settings"`
		} `json:"rules"`
	}
	r = mustMG(t, store, "policy", "check", "--json", pol)
	if err := json.Unmarshal([]byte(r.stdout), &rep); err != nil || rep.Failed != 0 || len(rep.Rules) != 1 || len(rep.Rules[0].Settings) < 20 {
		t.Fatalf("policy check --json of the draft: %v %+v\n%s", err, rep, r.stdout)
	}
	// The gate reads the draft: the candidate's first release passes or
	// fails on its merits, not on a policy it cannot read (exit 0 or 1).
	if r := mg(t, store, "gate", "promo-scorer:cand", "--to", "promo-scorer:prod", "--policy", pol, "--no-push"); r.code > 1 {
		t.Fatalf("gate with the drafted policy: exit %d\n%s", r.code, r.stderr)
	}
	// A budget the candidate itself exceeds is only a finding once the tag
	// serves it; a holdout that is not there always fails the check.
	text, _ := os.ReadFile(pol)
	bad := filepath.Join(dir, "bad.yaml")
	if err := os.WriteFile(bad, []byte(strings.Replace(string(text), `holdout: "promo-holdout:v1"`, `holdout: "promo-holdout:v2"`, 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	if r := mg(t, store, "policy", "check", bad); r.code != 2 || !strings.Contains(r.stdout, "promo-holdout:v2 is not in the store") {
		t.Fatalf("check with a missing holdout: exit %d\n%s\n%s", r.code, r.stdout, r.stderr)
	}
}
