package retain

import (
	"bytes"
	"context"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/google/go-containerregistry/pkg/authn"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// regWorld is a registry store (go-containerregistry's in-memory registry,
// pkg/registry v0.22.1, without the referrers API) and a policy whose
// retention lets listener-encoder's candidates go after the grace period.
type regWorld struct {
	t     *testing.T
	ctx   context.Context
	store *registry.Remote
	pol   *policy.Policy
	url   string // the registry's base URL
	// heads counts HEAD requests of user tags (not digests, not the
	// store's sha256- tags) since the counter was last reset.
	heads atomic.Int64
}

func newRegWorld(t *testing.T, keep int, clock func() time.Time) *regWorld {
	t.Helper()
	w := &regWorld{t: t, ctx: context.Background()}
	h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(false), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	srv := httptest.NewServer(http.HandlerFunc(func(rw http.ResponseWriter, req *http.Request) {
		if req.Method == http.MethodHead {
			if i := strings.LastIndex(req.URL.Path, "/manifests/"); i >= 0 {
				ref := req.URL.Path[i+len("/manifests/"):]
				if !strings.HasPrefix(ref, "sha256") {
					w.heads.Add(1)
				}
			}
		}
		h.ServeHTTP(rw, req)
	}))
	t.Cleanup(srv.Close)
	w.url = srv.URL
	opts := []registry.RemoteOption{registry.WithRemoteAuth(authn.Anonymous)}
	if clock != nil {
		opts = append(opts, registry.WithRemoteClock(clock))
	}
	s, err := registry.OpenRemote(strings.TrimPrefix(srv.URL, "http://")+"/podcasts", opts...)
	if err != nil {
		t.Fatal(err)
	}
	w.store = s
	text := `schemaVersion: 1
name: listener-encoder
rules:
  - target: listener-encoder:prod
    kind: encoder
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
retention:
  grace: 168h
  repositories:
    - {repository: listener-encoder, keepCandidates: ` + strconv.Itoa(keep) + `}
`
	p := filepath.Join(t.TempDir(), "policy.yaml")
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	if w.pol, err = policy.Load(p); err != nil {
		t.Fatal(err)
	}
	return w
}

// encoder is candidate seed of listener-encoder, its created annotation
// (the time its training finished) at created.
func encoder(seed uint64, created time.Time) storetest.Artifact {
	return storetest.NewArtifact(seed, artifact.ArtifactType("encoder"), nil, map[string]string{artifact.AnnotationCreated: created.UTC().Format(time.RFC3339)})
}

func (w *regWorld) mark(now time.Time) *Plan {
	w.t.Helper()
	plan, err := Mark(w.ctx, w.store, w.pol, Options{Now: now})
	if err != nil {
		w.t.Fatal(err)
	}
	return plan
}

func eligibleDigests(p *Plan) map[string]string {
	out := map[string]string{}
	for _, m := range p.Manifests {
		out[m.Digest] = m.Reason
	}
	return out
}

// TestRegistryAgeIsPushTime: on a registry an artifact's age runs from
// its push, not from its created annotation. A model trained 90 days ago
// and pushed a day before the collection is younger than the 7-day grace
// period and stays; before push times were recorded its annotation made it
// 90 days old and it was listed as an old candidate the moment it was
// pushed (this test failed so: "eligible: old-candidate").
func TestRegistryAgeIsPushTime(t *testing.T) {
	w := newRegWorld(t, 0, nil)
	pushed := time.Now().UTC()
	d := storetest.Push(t, w.store, encRepo, "", encoder(1, pushed.Add(-90*24*time.Hour)))
	plan := w.mark(pushed.Add(24 * time.Hour))
	if r, ok := eligibleDigests(plan)[d.Digest.String()]; ok {
		t.Fatalf("a model pushed a day ago is eligible: %s", r)
	}
	if plan.Kept.Reasons[KeepYoung] != 1 {
		t.Errorf("kept %v, want the model kept as %s", plan.Kept.Reasons, KeepYoung)
	}
	// Eight days after its push it is an old candidate.
	if r := eligibleDigests(w.mark(pushed.Add(8 * 24 * time.Hour)))[d.Digest.String()]; r != ReasonOldCandidate {
		t.Errorf("eight days after its push the model is %q, want %s", r, ReasonOldCandidate)
	}
	// A model put as a modelgate without push-time tags put it (its blobs,
	// then the manifest under its keep tag only) has no known age: kept,
	// and the plan says so.
	old := encoder(5, pushed.Add(-90*24*time.Hour))
	storetest.PushBlobs(t, w.store, encRepo, old)
	od := old.Descriptor().Digest
	req, err := http.NewRequest(http.MethodPut, w.url+"/v2/podcasts/"+encRepo+"/manifests/sha256-"+od.Hex+".keep", bytes.NewReader(old.Manifest.Data))
	if err != nil {
		t.Fatal(err)
	}
	req.Header.Set("Content-Type", string(types.OCIManifestSchema1))
	resp, err := http.DefaultClient.Do(req)
	if err != nil || resp.StatusCode != http.StatusCreated {
		t.Fatalf("putting the manifest by hand: %v %v", resp, err)
	}
	resp.Body.Close()
	plan = w.mark(pushed.Add(365 * 24 * time.Hour))
	if r, ok := eligibleDigests(plan)[od.String()]; ok || plan.Kept.Reasons[KeepAgeUnknown] != 1 || !strings.Contains(strings.Join(plan.Notes, "\n"), "1 manifests have no time") {
		t.Errorf("a manifest without push time: eligible %v (%s), kept %v, notes %q", ok, r, plan.Kept.Reasons, plan.Notes)
	}
}

// TestRegistryCandidatesInPushOrder: keepCandidates keeps the models
// pushed last, whatever their created annotations say. The model pushed
// second was trained first; with keepCandidates 1 it is the one kept.
func TestRegistryCandidatesInPushOrder(t *testing.T) {
	now := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	clock := func() time.Time { return now }
	w := newRegWorld(t, 1, clock)
	first := storetest.Push(t, w.store, encRepo, "", encoder(2, now.Add(-24*time.Hour)))
	now = now.Add(time.Hour)
	second := storetest.Push(t, w.store, encRepo, "", encoder(3, now.Add(-30*24*time.Hour)))
	el := eligibleDigests(w.mark(now.Add(30 * 24 * time.Hour)))
	if el[first.Digest.String()] != ReasonOldCandidate || el[second.Digest.String()] != "" {
		t.Errorf("eligible %v; want the first push (%s) eligible and the second (%s) kept", el, first.Digest, second.Digest)
	}
}

// TestRegistryRePushDuringCollection: a push of the very bytes of an
// eligible model between the mark and the sweep (CI pushing an old model
// again, here untagged, as a report or approval is pushed) makes it
// young: the sweep leaves it, and the push's result is readable
// afterwards. Before push times were recorded the sweep deleted the
// manifest right after that push succeeded (this test failed so:
// "manifest ... in repository listener-encoder: not found").
func TestRegistryRePushDuringCollection(t *testing.T) {
	w := newRegWorld(t, 0, nil)
	a := encoder(4, time.Now().Add(-90*24*time.Hour))
	d := storetest.Push(t, w.store, encRepo, "", a)
	plan := w.mark(time.Now().Add(30 * 24 * time.Hour))
	if eligibleDigests(plan)[d.Digest.String()] != ReasonOldCandidate {
		t.Fatalf("the model is not eligible: %+v", plan.Manifests)
	}
	if _, err := w.store.PutManifest(w.ctx, encRepo, types.OCIManifestSchema1, a.Manifest.Data); err != nil {
		t.Fatal(err)
	}
	res, err := Sweep(w.ctx, w.store, plan, SweepOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if _, _, err := w.store.Manifest(w.ctx, encRepo, d.Digest); err != nil {
		t.Fatalf("after the sweep: %v", err)
	}
	if res.Manifests != 0 || len(res.Skipped) == 0 || res.Skipped[0].Where != encRepo+"@"+d.Digest.String() {
		t.Errorf("sweep removed %d manifests, skipped %+v; want none removed, the model skipped", res.Manifests, res.Skipped)
	}
}

// TestRegistrySweepResolvesTagsOnce: removing manifests reads the
// repository's tags once per collection, not once per manifest: with 40
// tagged models and 8 eligible ones the sweep sends no HEAD of a user tag
// that the mark resolved (it sent 451 HEADs of user tags before: every tag
// once per removal), and still refuses
// a manifest that a tag created after the mark names, and one that an
// existing tag was moved to (both through Tag, as modelgate moves tags).
func TestRegistrySweepResolvesTagsOnce(t *testing.T) {
	now := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	w := newRegWorld(t, 0, func() time.Time { return now })
	var old []v1.Descriptor
	for i := range 40 {
		storetest.Push(t, w.store, encRepo, "ci-"+string(rune('a'+i%26))+string(rune('a'+i/26)), encoder(uint64(100+i), now))
	}
	for i := range 10 {
		old = append(old, storetest.Push(t, w.store, encRepo, "", encoder(uint64(200+i), now)))
	}
	plan := w.mark(now.Add(30 * 24 * time.Hour))
	if len(plan.Manifests) != 10 {
		t.Fatalf("plan lists %d manifests, want the 10 untagged ones", len(plan.Manifests))
	}
	// After the mark: a new tag on one, and an existing tag moved onto
	// another.
	if err := w.store.Tag(w.ctx, encRepo, "rescued", old[0]); err != nil {
		t.Fatal(err)
	}
	if err := w.store.Tag(w.ctx, encRepo, "ci-aa", old[1]); err != nil {
		t.Fatal(err)
	}
	w.heads.Store(0)
	res, err := Sweep(w.ctx, w.store, plan, SweepOptions{})
	if err != nil {
		t.Fatal(err)
	}
	// Each removal reads the target of the tag created after the mark
	// (8 HEADs of "rescued", and one more for the manifest it names);
	// the sweep's look for pushes since the mark, before the blob phase,
	// lists the store's manifests once (one HEAD of each of the 41 tags).
	n := w.heads.Load()
	t.Logf("HEADs of user tags during the sweep: %d", n)
	if n > 9+41 {
		t.Errorf("the sweep sent %d HEADs of user tags, want at most %d", n, 9+41)
	}
	skipped := 0
	for _, sk := range res.Skipped {
		if !strings.HasPrefix(sk.Where, "blob ") {
			skipped++
		}
	}
	if res.Manifests != 8 || skipped != 2 {
		t.Errorf("removed %d, skipped %+v; want 8 removed and the two tagged since the mark skipped", res.Manifests, res.Skipped)
	}
	for _, d := range old[:2] {
		if _, _, err := w.store.Manifest(w.ctx, encRepo, d.Digest); err != nil {
			t.Errorf("tagged since the mark, %s: %v", d.Digest, err)
		}
	}
}
