package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestJSONContract runs every command that ends with --json, on success
// and on failure, and validates each document against its schema.
func TestJSONContract(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the demo")
	}
	dir := t.TempDir()
	store, work := filepath.Join(dir, "store"), filepath.Join(dir, "work")
	checkJSON(t, "demo", mg(t, store, "demo", "--work", work, "--json"))
	pol := filepath.Join(work, "policies", "promo-scorer.yaml")
	key := func(n string) string { return filepath.Join(work, "keys", n+".key.pem") }
	enc, scorer := fixtures(t)
	retention := filepath.Join(dir, "retention.yaml")
	if err := os.WriteFile(retention, []byte("schemaVersion: 1\nname: keep-little\nrules: [{target: \"tiny-encoder:prod\", kind: encoder, checks: {holdout: {enabled: false}}}]\n"+
		"retention: {grace: 1h, repositories: [{repository: \"*\", keepCandidates: 0}]}\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		cmd  string
		args []string
		code int
	}{
		{"push", []string{"push", enc, "tiny-encoder:v1"}, 0},
		{"push", []string{"push", scorer, "tiny-scorer:v1"}, 0},
		{"push", []string{"push", filepath.Join(dir, "absent"), "tiny-encoder:v2"}, 2},
		{"pull", []string{"pull", "tiny-encoder:v1", filepath.Join(dir, "pulled")}, 0},
		{"pull", []string{"pull", "tiny-encoder:absent", filepath.Join(dir, "pulled2")}, 2},
		{"ls", []string{"ls"}, 0},
		{"ls", []string{"ls", "no-such-repo"}, 2},
		{"show", []string{"show", "promo-scorer:cand-better"}, 0},
		{"show", []string{"show", "promo-holdout:v1"}, 0},
		{"diff", []string{"diff", "promo-scorer:baseline", "promo-scorer:cand-shuffled-vocab"}, 0},
		{"verify", []string{"verify"}, 0},
		{"score", []string{"score", "promo-scorer:prod", "--holdout", "promo-holdout:v1", "--out", filepath.Join(dir, "p.csv")}, 0},
		{"gate", []string{"gate", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", pol, "--sign-key", key("ci")}, 1},
		{"gate", []string{"gate", "promo-scorer:cand-better", "--to", "promo-scorer:prod", "--policy", pol, "--shard", "1/2"}, 0},
		{"gate", []string{"gate", "promo-scorer:cand-better", "--to", "promo-scorer:prod", "--policy", filepath.Join(dir, "absent.yaml")}, 2},
		{"freeze", []string{"freeze", "tiny-scorer:v1", "--out", "tiny-scorer:frozen"}, 0},
		{"keygen", []string{"keygen", "--out", filepath.Join(dir, "kay"), "--name", "kay"}, 0},
		// The demo gated cand-worse before its rollback moved the tag: its
		// reports are against another baseline (conflict, 3).
		{"approve", []string{"approve", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", pol, "--key", key("ana")}, 3},
		{"promote", []string{"promote", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", pol, "--key", key("rita")}, 3},
		{"rollback", []string{"rollback", "promo-scorer:prod", "--reason", "contract test", "--dry-run"}, 2}, // the demo rolled back to the first release
		{"log", []string{"log", "promo-scorer:prod", "--policy", pol}, 0},
		{"policy", []string{"policy", "show", "promo-scorer:prod"}, 0},
		{"policy", []string{"policy", "show", "promo-scorer:staging"}, 2},
		{"policy", []string{"policy", "diff", "promo-scorer:prod", pol}, 0},
		{"policy", []string{"policy", "diff", "promo-scorer:prod", filepath.Join("..", "..", "policies", "promo-scorer.yaml")}, 1},
		{"policy", []string{"policy", "bind", "promo-scorer:prod", "--policy", pol}, 0},
		{"policy", []string{"policy", "bind", "promo-scorer:prod", "--policy", filepath.Join("..", "..", "policies", "promo-scorer.yaml"), "--key", key("rita")}, 4},
		{"policy", []string{"policy", "approve", "promo-scorer:prod", "--policy", filepath.Join("..", "..", "policies", "promo-scorer.yaml"), "--key", key("ana")}, 0},
		{"policy", []string{"policy", "draft", "promo-scorer:prod"}, 0},
		{"policy", []string{"policy", "check", pol}, 0},
		{"policy", []string{"policy", "check", filepath.Join(dir, "absent.yaml")}, 2},
		{"copy", []string{"copy", "tiny-encoder:v1", "--dest", filepath.Join(dir, "copy")}, 0},
		{"untag", []string{"untag", "promo-scorer:cand-over-budget"}, 0},
		{"untag", []string{"untag", "promo-scorer:prod"}, 4},
		{"untag", []string{"untag", "promo-scorer:cand-better", "--expect", "sha256:" + strings.Repeat("0", 64)}, 3},
		{"reclaim", []string{"reclaim", "--policy", retention}, 0},
		{"reclaim", []string{"reclaim", "--policy", retention, "--apply"}, 0},
		{"reclaim", []string{"reclaim"}, 2},
	} {
		r := mg(t, store, append(c.args, "--json")...)
		if r.code != c.code {
			t.Errorf("%s: exit %d, want %d\nstdout: %s\nstderr: %s", strings.Join(c.args, " "), r.code, c.code, r.stdout, r.stderr)
		}
		doc := checkJSON(t, c.cmd, r)
		if c.cmd == "gate" && c.code == 1 {
			if rep, _ := doc["report"].(map[string]any); rep["verdict"] != "fail" {
				t.Errorf("a failed gate's document has no .report.verdict fail: %v", doc)
			}
			if !strings.Contains(r.stderr, `{"event":"progress","phase":"holdout"`) {
				t.Errorf("gate --json emits no holdout progress events on stderr:\n%s", r.stderr)
			}
		}
	}

	// Off a terminal without --json (stderr is a pipe here): plain lines.
	// (A line at each phase; the lines every few seconds are
	// TestPlainProgress's, with ticks by hand.)
	r := mg(t, store, "gate", "promo-scorer:cand-worse", "--to", "promo-scorer:prod", "--policy", pol)
	if r.code != 1 || !strings.Contains(r.stderr, "modelgate: gate load") || !strings.Contains(r.stderr, "modelgate: gate holdout") {
		t.Errorf("gate off a terminal: exit %d, no progress lines:\n%s", r.code, r.stderr)
	}
	r = mustMG(t, store, "push", enc, "tiny-encoder:v3")
	if !strings.Contains(r.stderr, "modelgate: skip") && !strings.Contains(r.stderr, "modelgate: upload") {
		t.Errorf("push off a terminal prints no progress lines:\n%s", r.stderr)
	}
}
