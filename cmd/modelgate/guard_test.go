package main

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// forceTag moves repo:tag of the local store at dir to digest, bypassing
// modelgate's commands, as anyone who can write the store's files could.
func forceTag(t *testing.T, dir, repo, tag, digest string) {
	t.Helper()
	ctx := context.Background()
	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	d, err := registry.ParseDigest(digest)
	if err != nil {
		t.Fatal(err)
	}
	_, desc, err := l.Manifest(ctx, repo, d)
	if err != nil {
		t.Fatal(err)
	}
	if err := storetest.ForceTag(ctx, l, repo, tag, desc); err != nil {
		t.Fatal(err)
	}
}

// TestGuardedTags: once tiny-encoder:prod has a release log, push (a model
// or a holdout) and copy refuse to move it (exit 4, naming promote and
// rollback) and change nothing in the store; reserved tags are refused at
// push (exit 2); rollback and log keep working afterwards.
func TestGuardedTags(t *testing.T) {
	w := newReleaseWorld(t, 0)
	v1 := w.Push(1, "")
	w.Push(2, "")
	w.Gate("tiny-encoder:v1")
	wantExit(t, w.Promote("tiny-encoder:v1", "--key", w.Key("rita")), 0, "promoted")
	w.Gate("tiny-encoder:v2")
	wantExit(t, w.Promote("tiny-encoder:v2", "--key", w.Key("rita")), 0, "promoted")
	v2 := w.Prod()
	hold := filepath.Join(t.TempDir(), "hold.jsonl")
	if err := os.WriteFile(hold, []byte(`{"row_id":"r1","items":[1],"values":[1],"label":1}`+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	// A source store whose tiny-encoder:prod is a plain tag on another model.
	src := filepath.Join(t.TempDir(), "src")
	mustMG(t, src, "push", nameVariant(t, w.Dir, 3), "tiny-encoder:prod")

	before := listing(t, w.Store)
	for _, c := range []struct {
		name string
		args []string
		code int
		want []string
	}{
		{"push a model to the released tag", []string{"push", nameVariant(t, w.Dir, 3), "tiny-encoder:prod"}, 4, []string{"tiny-encoder:prod", "release log", "modelgate promote", "modelgate rollback"}},
		{"push the served model again", []string{"push", nameVariant(t, w.Dir, 2), "tiny-encoder:prod"}, 4, []string{"release log"}},
		{"push a holdout to the released tag", []string{"push", "--kind", "holdout", hold, "tiny-encoder:prod"}, 4, []string{"release log"}},
		{"push to the head pointer", []string{"push", nameVariant(t, w.Dir, 3), "tiny-encoder:release-prod"}, 2, []string{"release-prod", "reserved"}},
		{"push to another release- tag", []string{"push", nameVariant(t, w.Dir, 3), "tiny-encoder:release-canary"}, 2, []string{"reserved"}},
		{"push to a sha256- tag", []string{"push", nameVariant(t, w.Dir, 3), "tiny-encoder:sha256-" + strings.TrimPrefix(v2, "sha256:")}, 2, []string{"reserved"}},
		{"holdout to a reserved tag", []string{"push", "--kind", "holdout", hold, "tiny-encoder:release-prod"}, 2, []string{"reserved"}},
		{"copy a plain tag over the released one", []string{"copy", "tiny-encoder:prod", "--store", src, "--dest", w.Store}, 4, []string{"release log", "promote"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			wantExit(t, mg(t, w.Store, c.args...), c.code, c.want...)
			if after := listing(t, w.Store); after != before {
				t.Errorf("the store changed:\n%s", listingDiff(before, after))
			}
		})
	}
	if w.Prod() != v2 {
		t.Fatalf("prod moved to %s", w.Prod())
	}
	// copy --all copies what it may and refuses the released tag.
	wantExit(t, mg(t, src, "copy", "--all", "--dest", w.Store), 4, "release log")
	if w.Prod() != v2 {
		t.Fatalf("copy --all moved prod to %s", w.Prod())
	}
	mustMG(t, w.Store, "log", "tiny-encoder:prod")
	wantExit(t, mg(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "canary"), 0, "rolled back")
	if w.Prod() != v1 {
		t.Errorf("rollback went to %s, want %s", w.Prod(), v1)
	}
	mustMG(t, w.Store, "log", "tiny-encoder:prod")
	mustMG(t, w.Store, "verify")
}

// TestVerifyDuplicateTagEntries: two index.json entries for one tag — the
// same target twice, or two targets — are damage (exit 5), each naming
// the fix.
func TestVerifyDuplicateTagEntries(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, _ := fixtures(t)
	mustMG(t, store, "push", encDir, "tiny-encoder:v1")
	mustMG(t, store, "push", nameVariant(t, t.TempDir(), 1), "tiny-encoder:v2")
	mustMG(t, store, "verify")
	p := filepath.Join(store, "index.json")
	orig, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	// index.json holds only tag entries; add a second entry for
	// tiny-encoder:v1, as another tool or a hand edit could.
	var idx struct {
		SchemaVersion int              `json:"schemaVersion"`
		MediaType     string           `json:"mediaType"`
		Manifests     []map[string]any `json:"manifests"`
	}
	if err := json.Unmarshal(orig, &idx); err != nil || len(idx.Manifests) != 2 {
		t.Fatalf("index.json: %v, %d entries", err, len(idx.Manifests))
	}
	refOf := func(m map[string]any) string {
		return m["annotations"].(map[string]any)["org.opencontainers.image.ref.name"].(string)
	}
	entries := map[string]map[string]any{}
	for _, m := range idx.Manifests {
		entries[refOf(m)] = m
	}
	withRef := func(m map[string]any, ref string) map[string]any {
		b, _ := json.Marshal(m)
		var c map[string]any
		json.Unmarshal(b, &c)
		c["annotations"].(map[string]any)["org.opencontainers.image.ref.name"] = ref
		return c
	}
	same := withRef(entries["tiny-encoder:v1"], "tiny-encoder:v1")
	other := withRef(entries["tiny-encoder:v2"], "tiny-encoder:v1")
	for _, c := range []struct {
		name string
		add  map[string]any
		want []string
	}{
		{"same target twice", same, []string{"2 entries for this tag, all pointing at", "delete all but one"}},
		{"two targets", other, []string{"different manifests", "keep only the right entry", "modelgate log"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			dup := idx
			dup.Manifests = append([]map[string]any{c.add}, idx.Manifests...)
			b, err := json.Marshal(dup)
			if err != nil {
				t.Fatal(err)
			}
			if err := os.WriteFile(p, b, 0o644); err != nil {
				t.Fatal(err)
			}
			defer os.WriteFile(p, orig, 0o644)
			wantExit(t, mg(t, store, "verify"), 5, c.want...)
		})
	}
}

// TestCopyReleasedScorer: copying tiny-scorer:prod (a scorer
// with a release log of two records) into each store kind brings the
// scorer's encoder from its own repository and the whole log, so that at
// the destination verify, score, log and rollback pass; a second copy
// after a rollback at the source brings the log forward; a destination
// with a release of its own is refused (exit 4).
func TestCopyReleasedScorer(t *testing.T) {
	src := filepath.Join(t.TempDir(), "src")
	encDir, scorerDir := fixtures(t)
	mustMG(t, src, "push", encDir, "tiny-encoder:v1")
	v1 := strings.TrimSpace(mustMG(t, src, "push", scorerDir, "tiny-scorer:v1").stdout)
	d, err := modeldir.Read(scorerDir)
	if err != nil {
		t.Fatal(err)
	}
	m := d.Model
	m.Spec.Name += "-refit"
	v2Dir := filepath.Join(t.TempDir(), "v2")
	if err := modeldir.Write(v2Dir, m); err != nil {
		t.Fatal(err)
	}
	v2 := strings.TrimSpace(mustMG(t, src, "push", v2Dir, "tiny-scorer:v2").stdout)
	hold, _ := probeHoldout(t, scorerDir)
	mustMG(t, src, "push", "--kind", "holdout", hold, "tiny-holdout:v1")
	dir := t.TempDir()
	mustMG(t, src, "keygen", "--out", filepath.Join(dir, "ci"))
	pol := filepath.Join(dir, "policy.yaml")
	if err := os.WriteFile(pol, []byte(`schemaVersion: 1
name: tiny-scorer
rules:
  - target: tiny-scorer:prod
    kind: scorer
    holdout: tiny-holdout:v1
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
    approvals:
      required: 0
      reportSigners:
        - {name: ci, keyFile: ci.pub.pem}
`), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, c := range []string{"tiny-scorer:v1", "tiny-scorer:v2"} {
		mustMG(t, src, "gate", c, "--to", "tiny-scorer:prod", "--policy", pol, "--sign-key", filepath.Join(dir, "ci.key.pem"))
		mustMG(t, src, "promote", c, "--to", "tiny-scorer:prod", "--policy", pol)
	}
	records := func(store string) int {
		t.Helper()
		return strings.Count(mustMG(t, store, "log", "tiny-scorer:prod").stdout, "\n#")
	}
	prod := func(store string) string {
		t.Helper()
		var rows []lsRow
		if err := json.Unmarshal([]byte(mustMG(t, store, "ls", "--json", "tiny-scorer").stdout), &rows); err != nil {
			t.Fatal(err)
		}
		for _, r := range rows {
			if r.Repository == "tiny-scorer" && r.Tag == "prod" {
				return r.Digest
			}
		}
		return ""
	}
	for _, k := range everyStore(t, "copy") {
		t.Run(k.name, func(t *testing.T) {
			verify := []string{"verify"}
			if k.name == "registry-no-catalog" { // it cannot list repositories: name them
				verify = append(verify, "tiny-scorer", "tiny-encoder")
			}
			r := mustMG(t, src, "copy", "tiny-scorer:prod", "--dest", k.loc)
			for _, s := range []string{"tiny-encoder@", "tag tiny-scorer:prod", "tag tiny-scorer:release-prod"} {
				if !strings.Contains(r.stdout, s) {
					t.Errorf("copy output lacks %q:\n%s", s, r.stdout)
				}
			}
			mustMG(t, k.loc, verify...)
			if n, want := records(k.loc), records(src); n != want || n < 2 {
				t.Errorf("the copied log has %d records, the source's %d", n, want)
			}
			mustMG(t, k.loc, "score", "tiny-scorer:prod", "--holdout", hold, "--out", filepath.Join(t.TempDir(), "p.jsonl"))
			// The same copy again changes nothing and succeeds.
			mustMG(t, src, "copy", "tiny-scorer:prod", "--dest", k.loc)

			// A rollback at the source: the next copy brings it forward.
			mustMG(t, src, "rollback", "tiny-scorer:prod", "--reason", "canary: fewer subscriptions")
			mustMG(t, src, "copy", "tiny-scorer:prod", "--dest", k.loc)
			if got, n, want := prod(k.loc), records(k.loc), records(src); got != v1 || n != want {
				t.Errorf("after the second copy prod = %s with %d records, want %s with %d", got, n, v1, want)
			}
			mustMG(t, k.loc, verify...)
			// On-call at the destination can roll back there.
			mustMG(t, k.loc, "rollback", "tiny-scorer:prod", "--reason", "region canary", "--to", v2)
			if got := prod(k.loc); got != v2 {
				t.Errorf("rollback at the destination went to %s", got)
			}
			// Now the destination has a release the source lacks.
			wantExit(t, mg(t, src, "copy", "tiny-scorer:prod", "--dest", k.loc), 4, "promote", "rollback")
			wantExit(t, mg(t, src, "copy", "--all", "--dest", k.loc), 4, "promote", "rollback")
			if got := prod(k.loc); got != v2 {
				t.Errorf("a refused copy moved prod to %s", got)
			}
			mustMG(t, k.loc, "log", "tiny-scorer:prod")
			// Put the source back for the next store kind.
			mustMG(t, src, "rollback", "tiny-scorer:prod", "--reason", "restore", "--to", v2)
		})
	}
}

// TestOnCallLog: log numbers the releases and names each record's models
// by the tags pointing at them (full digests in --json); rollback --to
// takes a release number, a unique 12-hex-digit prefix (as log prints
// it) or a tag; a tag that was only pushed has no release log, which log
// says plainly with exit 0.
func TestOnCallLog(t *testing.T) {
	w := newReleaseWorld(t, 0)
	var ds []string
	for i := 1; i <= 3; i++ {
		ds = append(ds, w.Push(i, ""))
		c := fmt.Sprintf("tiny-encoder:v%d", i)
		w.Gate(c)
		wantExit(t, w.Promote(c, "--key", w.Key("rita")), 0, "promoted")
	}
	lg := mustMG(t, w.Store, "log", "tiny-encoder:prod").stdout
	for _, s := range []string{"#1 ", "#2 ", "#3 ", "tiny-encoder:v1 (", "tiny-encoder:v2 (", "tiny-encoder:prod, tiny-encoder:v3 ("} {
		if !strings.Contains(lg, s) {
			t.Errorf("log lacks %q:\n%s", s, lg)
		}
	}
	var rep struct {
		Entries []struct {
			Number int
			Record struct{ To string }
		}
		Names map[string][]string
	}
	if err := json.Unmarshal([]byte(mustMG(t, w.Store, "log", "--json", "tiny-encoder:prod").stdout), &rep); err != nil || len(rep.Entries) != 3 {
		t.Fatalf("log --json: %v, %+v", err, rep)
	}
	for i, e := range rep.Entries {
		if e.Number != 3-i || e.Record.To != ds[2-i] || !strings.Contains(strings.Join(rep.Names[e.Record.To], " "), fmt.Sprintf("tiny-encoder:v%d", 3-i)) {
			t.Errorf("entry %d: number %d, to %s, names %v; want %d, %s", i, e.Number, e.Record.To, rep.Names[e.Record.To], 3-i, ds[2-i])
		}
	}
	rb := func(to string) result {
		return mg(t, w.Store, "rollback", "tiny-encoder:prod", "--reason", "canary", "--to", to)
	}
	wantExit(t, rb("1"), 0, "rolled back")
	if w.Prod() != ds[0] {
		t.Errorf("--to 1 went to %s, want %s", w.Prod(), ds[0])
	}
	wantExit(t, rb(ds[1][:19]), 0) // sha256: and 12 hex digits, as log prints it
	if w.Prod() != ds[1] {
		t.Errorf("--to a 12-digit prefix went to %s, want %s", w.Prod(), ds[1])
	}
	wantExit(t, rb("#3"), 0)
	wantExit(t, rb("v1"), 0)
	if w.Prod() != ds[0] {
		t.Errorf("--to v1 went to %s, want %s", w.Prod(), ds[0])
	}
	wantExit(t, rb(strings.TrimPrefix(ds[2], "sha256:")[:14]), 0)
	if w.Prod() != ds[2] {
		t.Errorf("--to a bare 14-digit prefix went to %s, want %s", w.Prod(), ds[2])
	}
	wantExit(t, rb(ds[1][:17]), 2, "12 hex digits")       // too short
	wantExit(t, rb("99"), 2, "numbers its releases 1 to") // no such release
	other := w.Push(9, "tiny-encoder:v9")
	wantExit(t, rb(other[:19]), 2, "no digest released")
	mustMG(t, w.Store, "log", "tiny-encoder:prod")

	// Only pushed: no release log, exit 0, said plainly.
	r := mg(t, w.Store, "log", "tiny-encoder:v9")
	wantExit(t, r, 0, "has no release log", "never promoted")
	if strings.Contains(r.stdout+r.stderr, "DAMAGE") {
		t.Errorf("log of a pushed tag reports damage:\n%s", r.stdout)
	}
}
