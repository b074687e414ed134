package main

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// reclaimDoc is the part of reclaim --json the tests read.
type reclaimDoc struct {
	Plan struct {
		Tags      []struct{ Tag string }
		Manifests []struct{ Digest, Reason string }
		Blobs     []struct{ Digest string }
		Bytes     int64
	}
	Result *struct {
		Tags, Manifests, Blobs int
		Bytes                  int64
	}
}

func (d reclaimDoc) steps() int { return len(d.Plan.Tags) + len(d.Plan.Manifests) + len(d.Plan.Blobs) }

// reclaimWorld is a release world whose policy lets tiny-encoder's old
// candidates go: ci-0 (a tag that expires after 2h), five candidates
// pushed to a moving tag (latest), two of them promoted to prod and one
// more gated. Collected a month later, ci-0's tag and model and the gated,
// unpromoted candidate with its report are eligible; the promoted ones,
// their reports and records, latest and the newest untagged candidate are
// kept.
func reclaimWorld(t *testing.T, store string) (w *releaseWorld, released []string) {
	t.Helper()
	w = newReleaseWorldAt(t, 0, store)
	f, err := os.OpenFile(w.Policy, os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.WriteString("retention:\n  grace: 1h\n  repositories:\n    - {repository: tiny-encoder, keepCandidates: 1, expireTags: [{tags: \"ci-*\", after: 2h}]}\n"); err != nil {
		t.Fatal(err)
	}
	f.Close()
	w.Push(0, "tiny-encoder:ci-0")
	var d []string
	for i := 1; i <= 5; i++ {
		d = append(d, "tiny-encoder@"+w.Push(i, "tiny-encoder:latest"))
	}
	for _, i := range []int{0, 1, 2} {
		w.Gate(d[i])
		if i != 1 {
			wantExit(t, w.Promote(d[i], "--key", w.Key("rita")), 0)
			released = append(released, d[i])
		}
	}
	return w, released
}

// TestReclaimCrash: reclaim --apply is killed (SIGKILL, by the crash
// suite's build) after every removal of a collection in turn, on the
// local store and the GCS emulator; after each kill verify passes and prod's log verifies, and
// the next run goes on, until a run finishes with nothing left to remove.
// The released models and their reports are all there at the end.
func TestReclaimCrash(t *testing.T) {
	if testing.Short() {
		t.Skip("crash suite skipped with -short")
	}
	for _, k := range everyStore(t, "reclaimcrash") {
		if k.name != "local" && k.name != "gcs" {
			continue // a registry keeps no manifest times (ages come from annotations) and removes no blobs
		}
		t.Run(k.name, func(t *testing.T) { crashReclaim(t, k.loc) })
	}
}

func crashReclaim(t *testing.T, store string) {
	w, released := reclaimWorld(t, store)
	// The crash suite's build reads its clock from MODELGATE_TEST_NOW: a
	// month on, everything is past the grace period.
	t.Setenv("MODELGATE_TEST_NOW", time.Now().Add(30*24*time.Hour).UTC().Format(time.RFC3339))
	args := []string{"reclaim", "--policy", w.Policy, "--json"}
	first := runCrashAt(t, store, "", args...)
	var plan reclaimDoc
	if err := json.Unmarshal([]byte(first.res.stdout), &plan); err != nil || first.res.code != 0 {
		t.Fatalf("dry run: exit %d %v\n%s%s", first.res.code, err, first.res.stdout, first.res.stderr)
	}
	reasons := map[string]int{}
	for _, m := range plan.Plan.Manifests {
		reasons[m.Reason]++
	}
	// ci-0's tag; ci-0's model, the gated candidate and its report; their
	// spec blobs and the report's blobs.
	if len(plan.Plan.Tags) != 1 || reasons["expired-tag"] != 1 || reasons["old-candidate"] != 1 || reasons["referrer-of-eligible"] != 1 || len(plan.Plan.Blobs) < 3 {
		t.Fatalf("plan: %d tags, manifests %v, %d blobs\n%s", len(plan.Plan.Tags), reasons, len(plan.Plan.Blobs), first.res.stdout)
	}
	kills := 0
	for {
		k := runCrashAt(t, store, "reclaim:1", append(args, "--apply")...)
		if k.finished {
			if k.res.code != 0 {
				t.Fatalf("run after %d kills: exit %d\n%s%s", kills, k.res.code, k.res.stdout, k.res.stderr)
			}
			break
		}
		kills++
		what := fmt.Sprintf("after kill %d", kills)
		mustVerify(t, store, what)
		if r := mg(t, store, "log", "tiny-encoder:prod", "--json"); r.code != 0 {
			t.Fatalf("%s: log exit %d\n%s%s", what, r.code, r.stdout, r.stderr)
		}
		if kills > plan.steps() {
			t.Fatalf("%d kills, the plan had %d steps: no progress", kills, plan.steps())
		}
	}
	// One removal per killed run: a kill at every step of the collection.
	t.Logf("%d kills for a plan of %d steps (%d tags, %d manifests, %d blobs)", kills, plan.steps(), len(plan.Plan.Tags), len(plan.Plan.Manifests), len(plan.Plan.Blobs))
	if kills != plan.steps() {
		t.Errorf("%d kills for a plan of %d steps", kills, plan.steps())
	}
	after := runCrashAt(t, store, "", args...)
	var rest reclaimDoc
	if err := json.Unmarshal([]byte(after.res.stdout), &rest); err != nil || rest.steps() != 0 {
		t.Errorf("after the collection %v: %s", err, after.res.stdout)
	}
	mustVerify(t, store, "at the end")
	for _, d := range released {
		mustMG(t, store, "show", d)
		r := mustMG(t, store, "show", d, "--json")
		if !strings.Contains(r.stdout, `"report"`) {
			t.Errorf("released %s lost its gate report:\n%s", d, r.stdout)
		}
	}
	tags := storeTags(t, store)
	if tags["tiny-encoder:ci-0"] != "" || tags["tiny-encoder:latest"] == "" || tags["tiny-encoder:prod"] == "" {
		t.Errorf("tags after the collection: %v", tags)
	}
}

// TestReclaimCopyAll: copy --all of a collected store copies only what is
// left: the destination holds exactly the source's manifests, and the
// collected ones are absent.
func TestReclaimCopyAll(t *testing.T) {
	if testing.Short() {
		t.Skip("builds a release world")
	}
	store := filepath.Join(t.TempDir(), "store")
	w, _ := reclaimWorld(t, store)
	t.Setenv("MODELGATE_TEST_NOW", time.Now().Add(30*24*time.Hour).UTC().Format(time.RFC3339))
	// The dry run's text: what would go, grouped by reason, and the bytes.
	dry := runCrashAt(t, store, "", "reclaim", "--policy", w.Policy)
	for _, want := range []string{"would remove, by reason:", "expired-tag", "old-candidate", "referrer-of-eligible", "would reclaim", "(dry run: --apply removes them)", "kept "} {
		if !strings.Contains(dry.res.stdout, want) {
			t.Errorf("dry run output lacks %q:\n%s", want, dry.res.stdout)
		}
	}
	if dry.res.code != 0 || !strings.Contains(dry.res.stderr, "modelgate: mark") {
		t.Errorf("dry run: exit %d, no progress line for the mark on stderr:\n%s", dry.res.code, dry.res.stderr)
	}
	k := runCrashAt(t, store, "", "reclaim", "--policy", w.Policy, "--apply", "--json")
	var doc reclaimDoc
	if err := json.Unmarshal([]byte(k.res.stdout), &doc); err != nil || k.res.code != 0 || doc.Result == nil || doc.Result.Manifests != 3 || doc.Result.Bytes != doc.Plan.Bytes {
		t.Fatalf("reclaim: exit %d %v\n%s%s", k.res.code, err, k.res.stdout, k.res.stderr)
	}
	dest := filepath.Join(t.TempDir(), "copy")
	mustMG(t, store, "copy", "--all", "--dest", dest)
	mustVerify(t, dest, "the copy")
	src, dst := storeManifests(t, store), storeManifests(t, dest)
	if strings.Join(src, "\n") != strings.Join(dst, "\n") {
		t.Errorf("copy --all: source has %d manifests, destination %d", len(src), len(dst))
	}
	for _, m := range doc.Plan.Manifests {
		for _, d := range dst {
			if strings.HasSuffix(d, m.Digest) {
				t.Errorf("collected %s was copied", m.Digest)
			}
		}
	}
	if r := mustMG(t, dest, "log", "tiny-encoder:prod"); r.code != 0 {
		t.Errorf("log at the destination: %s", r.stderr)
	}
}

// storeManifests lists every manifest of a local store as repo@digest,
// sorted, from the store's own records.
func storeManifests(t *testing.T, store string) []string {
	t.Helper()
	var out []string
	root := filepath.Join(store, ".modelgate", "repos")
	repos, err := os.ReadDir(root)
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range repos {
		ms, err := os.ReadDir(filepath.Join(root, r.Name(), "manifests"))
		if err != nil {
			t.Fatal(err)
		}
		for _, m := range ms {
			out = append(out, r.Name()+"@sha256:"+m.Name())
		}
	}
	return out
}

// TestReclaimOnRegistry: on an OCI registry (the in-memory one) the ages
// come from the push-time tags the pushes wrote; reclaim --apply removes
// the expired tag and the eligible manifests, says the registry removes
// no blobs, and the store and prod's log verify afterwards.
func TestReclaimOnRegistry(t *testing.T) {
	if testing.Short() {
		t.Skip("builds a release world")
	}
	var store string
	for _, k := range everyStore(t, "reclaimreg") {
		if k.name == "registry" {
			store = k.loc
		}
	}
	w, released := reclaimWorld(t, store)
	t.Setenv("MODELGATE_TEST_NOW", time.Now().Add(30*24*time.Hour).UTC().Format(time.RFC3339))
	k := runCrashAt(t, store, "", "reclaim", "--policy", w.Policy, "--apply", "--json")
	var doc struct {
		reclaimDoc
		Result *struct {
			Tags, Manifests  int
			BlobsUnsupported bool
		}
	}
	if err := json.Unmarshal([]byte(k.res.stdout), &doc); err != nil || k.res.code != 0 || doc.Result == nil {
		t.Fatalf("reclaim: exit %d %v\n%s%s", k.res.code, err, k.res.stdout, k.res.stderr)
	}
	// The candidates' created annotations are all the fixture's (one
	// time), but their push times follow the pushes: keepCandidates 1
	// keeps the last untagged one pushed (the fourth), so ci-0's model,
	// the gated second candidate and its report go: three manifests.
	if doc.Result.Tags != 1 || doc.Result.Manifests != 3 || !doc.Result.BlobsUnsupported {
		t.Errorf("removed %+v\n%s", doc.Result, k.res.stdout)
	}
	mustVerify(t, store, "after reclaim")
	mustMG(t, store, "log", "tiny-encoder:prod")
	for _, d := range released {
		mustMG(t, store, "show", d)
	}
	if tags := storeTags(t, store); tags["tiny-encoder:ci-0"] != "" || tags["tiny-encoder:latest"] == "" {
		t.Errorf("tags after the collection: %v", tags)
	}
}
