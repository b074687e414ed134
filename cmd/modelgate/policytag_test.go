package main

import (
	"path/filepath"
	"strings"
	"testing"
)

// TestPolicyHoldoutTagGuarded: on the demo store, whose bound policies
// name promo-holdout:v1 and listener-holdout:v1 by tag, a plain push,
// untag, copy or freeze refuses to move them (exit 4, naming the guarded
// tag whose policy names them), while pushing the same holdout again and
// pushing to a new tag work. Before this rule a push moved
// promo-holdout:v1 and the next gate judged candidates on the new rows.
func TestPolicyHoldoutTagGuarded(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	work := filepath.Join(t.TempDir(), "work")
	mustMG(t, store, "demo", "--work", work)
	promo := filepath.Join(work, "holdouts", "promo-holdout.parquet")
	listener := filepath.Join(work, "holdouts", "listener-holdout.parquet")
	before := storeTags(t, store)
	if before["promo-holdout:v1"] == "" || before["listener-holdout:v1"] == "" {
		t.Fatalf("demo tags: %v", before)
	}
	unchanged := func(what string) {
		t.Helper()
		after := storeTags(t, store)
		for _, tag := range []string{"promo-holdout:v1", "listener-holdout:v1", "promo-scorer:prod", "listener-encoder:prod"} {
			if after[tag] != before[tag] {
				t.Errorf("%s: %s moved from %s to %s", what, tag, before[tag], after[tag])
			}
		}
	}
	src := filepath.Join(t.TempDir(), "src")
	mustMG(t, src, "push", "--kind", "holdout", listener, "promo-holdout:v1")
	for _, c := range []struct {
		name string
		args []string
		want []string
	}{
		{"push another holdout to the policy's tag", []string{"push", "--kind", "holdout", listener, "promo-holdout:v1"},
			[]string{"promo-holdout:v1", "holdout of the policy bound to promo-scorer:prod", "policy change"}},
		{"push to the encoder policy's holdout tag", []string{"push", "--kind", "holdout", promo, "listener-holdout:v1"},
			[]string{"listener-holdout:v1", "listener-encoder:prod"}},
		{"untag the policy's holdout", []string{"untag", "promo-holdout:v1"}, []string{"promo-holdout:v1", "promo-scorer:prod"}},
		{"copy another holdout over it", []string{"copy", "promo-holdout:v1", "--store", src, "--dest", store}, []string{"promo-scorer:prod"}},
		{"freeze a scorer to it", []string{"freeze", "promo-scorer:cand-better", "--out", "promo-holdout:v1"}, []string{"promo-scorer:prod"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			wantExit(t, mg(t, store, c.args...), 4, c.want...)
			unchanged(c.name)
		})
	}
	// The same holdout again is no move; a new tag is free.
	mustMG(t, store, "push", "--kind", "holdout", promo, "promo-holdout:v1")
	mustMG(t, store, "push", "--kind", "holdout", listener, "promo-holdout:v2")
	unchanged("pushing the same holdout again")
	// Nothing the refusals left behind damages the store.
	mustMG(t, store, "verify")

	// A release log damaged by a direct write (its head pointer moved onto
	// a model) does not stop pushes elsewhere: moving another tag (which
	// reads the bound policies) says the bound policy cannot be read, and
	// log reports the damage.
	forceTag(t, store, "promo-scorer", "release-prod", before["promo-scorer:prod"])
	r := mustMG(t, store, "push", "--kind", "holdout", promo, "promo-holdout:v2")
	if !strings.Contains(r.stderr, "promo-scorer:prod cannot be read") {
		t.Errorf("push beside a damaged log: no note\n%s", r.stderr)
	}
	wantExit(t, mg(t, store, "log", "promo-scorer:prod"), 5)
}
