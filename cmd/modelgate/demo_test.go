package main

import (
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"
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
	before := countBlobs(t, store)
	mustMG(t, store, "demo", "--work", work)
	if after := countBlobs(t, store); after != before {
		t.Errorf("a second demo run wrote %d new blobs", after-before)
	}
}
