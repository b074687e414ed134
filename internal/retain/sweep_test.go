package retain

import (
	"encoding/json"
	"fmt"
	"slices"
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

// collect marks and sweeps the scene's store at the fake clock's time.
func (s *scene) collect() (*Plan, *Result) {
	s.t.Helper()
	blobs, err := ListBlobs(s.ctx, s.store)
	if err != nil {
		s.t.Fatal(err)
	}
	plan, err := Mark(s.ctx, s.store, s.pol, Options{Now: s.store.clock(), Blobs: blobs})
	if err != nil {
		s.t.Fatal(err)
	}
	res, err := Sweep(s.ctx, s.store, plan, SweepOptions{})
	if err != nil {
		s.t.Fatal(err)
	}
	return plan, res
}

// history snapshot: what must survive any collection.
type mustKeep struct {
	records  []v1.Hash // every release record and marker
	released []v1.Hash
	reports  []v1.Hash // the gate reports of released models
}

func (s *scene) mustKeep() mustKeep {
	s.t.Helper()
	var k mustKeep
	descs, err := s.store.Manifests(s.ctx, encRepo)
	if err != nil {
		s.t.Fatal(err)
	}
	for _, d := range descs {
		if d.ArtifactType == release.ArtifactTypeRelease || d.ArtifactType == release.ArtifactTypeCommitted || d.ArtifactType == release.ArtifactTypeEnded {
			k.records = append(k.records, d.Digest)
		}
	}
	k.released = append(k.released, s.released...)
	for _, m := range s.released {
		rs, err := s.store.Referrers(s.ctx, encRepo, m, artifact.ArtifactType("report"))
		if err != nil || len(rs) == 0 {
			s.t.Fatalf("released %s has no report: %v", m, err)
		}
		for _, r := range rs {
			k.reports = append(k.reports, r.Digest)
		}
	}
	return k
}

// check asserts the store verifies, prod's log verifies, and everything
// k lists is present with its blobs.
func (s *scene) check(k mustKeep) {
	s.t.Helper()
	rep, err := artifact.VerifyStore(s.ctx, s.store, nil)
	if err != nil {
		s.t.Fatal(err)
	}
	if !rep.OK() {
		s.t.Errorf("verify: %d damaged: %+v", rep.Damage, rep.Findings)
	}
	// log verifies on every tag (prod has the release log; the others
	// were only pushed and say so).
	tags, err := s.store.Tags(s.ctx, encRepo)
	if err != nil {
		s.t.Fatal(err)
	}
	for _, tag := range tags {
		if registry.IsReservedTag(tag) {
			continue
		}
		lr, err := release.Log(s.ctx, s.store, registry.Ref{Repository: encRepo, Tag: tag}, release.LogOptions{})
		if err != nil {
			s.t.Fatalf("log of %s: %v", tag, err)
		}
		if lr.Worst() != 0 || (tag == prod.Tag) == lr.NoLog || (tag == prod.Tag && len(lr.Entries) != len(s.released)+s.rollbacks) {
			s.t.Errorf("log of %s: %d entries, no log %v, findings %+v", tag, len(lr.Entries), lr.NoLog, lr.Findings)
		}
	}
	for _, group := range [][]v1.Hash{k.records, k.released, k.reports} {
		for _, d := range group {
			if _, err := artifact.ReadArtifact(s.ctx, s.store, registry.Ref{Repository: encRepo, Digest: d}); err != nil {
				s.t.Errorf("%s is gone: %v", d, err)
			}
		}
	}
	for _, m := range k.released {
		a, err := artifact.ReadArtifact(s.ctx, s.store, registry.Ref{Repository: encRepo, Digest: m})
		if err != nil {
			continue
		}
		if probs, err := artifact.CheckModel(s.ctx, s.store, a); err != nil || len(probs) > 0 {
			s.t.Errorf("released model %s: %v %v", m, err, probs)
		}
	}
}

func TestSweepSmallHistory(t *testing.T) {
	s := newScene(t, testRetention)
	s.history(12, 24*time.Hour, 3, 2)
	s.store.advance(40 * 24 * time.Hour)
	keep := s.mustKeep()
	plan, res := s.collect()
	if res.Manifests != len(plan.Manifests) || res.Blobs != len(plan.Blobs) || res.Tags != len(plan.Tags) || len(res.Skipped) != 0 {
		t.Errorf("removed %d/%d manifests, %d/%d blobs, %d/%d tags, skipped %+v", res.Manifests, len(plan.Manifests), res.Blobs, len(plan.Blobs), res.Tags, len(plan.Tags), res.Skipped)
	}
	if res.Bytes != plan.Bytes || res.Bytes == 0 {
		t.Errorf("reclaimed %d bytes, the plan said %d", res.Bytes, plan.Bytes)
	}
	s.check(keep)
	// A second collection finds nothing more.
	plan, _ = s.collect()
	if len(plan.Manifests)+len(plan.Blobs)+len(plan.Tags) != 0 {
		t.Errorf("second collection: %+v", plan.Groups)
	}
}

// TestThousandCandidates: CI pushed 1,000 candidates over eight simulated
// months (one every six hours, each with a gate report), 30 of them were
// promoted and 10 of those promotions rolled back. After a collection
// every release record, released model and its reports are present, the
// log verifies, the store verifies, and the bytes reclaimed are those the
// plan reported.
func TestThousandCandidates(t *testing.T) {
	if testing.Short() {
		t.Skip("1,000 pushes")
	}
	s := newScene(t, testRetention)
	s.history(1000, 6*time.Hour, 33, 3)
	if len(s.released) != 30 {
		t.Fatalf("%d releases", len(s.released))
	}
	keep := s.mustKeep()
	plan, res := s.collect()
	t.Logf("reclaimed %d bytes: %d tags, %d manifests, %d blobs; kept %d manifests %v", res.Bytes, res.Tags, res.Manifests, res.Blobs, plan.Kept.Manifests, plan.Kept.Reasons)
	for _, g := range res.Groups {
		t.Logf("  %-22s %4d tags %5d manifests %5d blobs %9d bytes", g.Reason, g.Tags, g.Manifests, g.Blobs, g.Bytes)
	}
	if res.Bytes != plan.Bytes || res.Bytes == 0 || len(res.Skipped) != 0 {
		t.Errorf("reclaimed %d bytes, the plan said %d; skipped %+v", res.Bytes, plan.Bytes, res.Skipped)
	}
	// The grace period (48h) keeps the last eight candidates, and three
	// more are kept as the newest: at most 11 + 30 released + a few
	// tagged models are left of 1,000.
	if res.Manifests < 1700 {
		t.Errorf("only %d manifests removed", res.Manifests)
	}
	s.check(keep)
}

// TestPushRacesCollection: in each of six rounds, while a collection
// runs, a pusher stores a new candidate (its blobs uploaded while the
// collection marks and sweeps), pushes again exactly the bytes of two old
// candidates the collection is removing (blobs and manifest found present
// and reused, or gone and uploaded again, depending on where the sweep
// is), and pushes again the model prod serves, each under a new tag;
// afterwards every model pushed is whole (every blob present and
// re-hashing to its digest) and the store verifies. The exact
// interleavings are TestRePushDuringSweep's and storetest.ReuseRaces';
// this test runs whatever the scheduler makes of it.
func TestPushRacesCollection(t *testing.T) {
	s := newScene(t, testRetention)
	s.history(30, 24*time.Hour, 10, 2)
	keep := s.mustKeep()
	next := 1000
	for round := range 6 {
		s.store.advance(10 * 24 * time.Hour)
		type pushed struct {
			tag string
			d   v1.Hash
			err error
		}
		done := make(chan []pushed)
		go func() {
			var out []pushed
			for j := range 4 {
				i := next + j
				tag := fmt.Sprintf("race-%d-%d", round, j)
				switch j {
				case 1, 2:
					// Old candidates of the history, neither tagged nor
					// released, one pair a round: eligible when the
					// collection marks.
					i = [][2]int{{1, 2}, {3, 4}, {5, 6}, {7, 8}, {11, 12}, {13, 14}}[round][j-1]
				case 3:
					i = 9 // the first model promoted to prod: its content again
				}
				d, err := s.tryPush(i, tag)
				out = append(out, pushed{tag, d, err})
			}
			done <- out
		}()
		s.collect()
		for _, p := range <-done {
			if p.err != nil {
				t.Errorf("round %d: %v", round, p.err)
				continue
			}
			a, err := artifact.ReadArtifact(s.ctx, s.store, registry.Ref{Repository: encRepo, Tag: p.tag})
			if err != nil {
				t.Errorf("round %d: %s: %v", round, p.tag, err)
				continue
			}
			if probs, err := artifact.CheckModel(s.ctx, s.store, a); err != nil || len(probs) > 0 {
				t.Errorf("round %d: %s lost content: %v %v", round, p.tag, err, probs)
			}
		}
		next += 4
		s.check(keep)
	}
}

// TestRePushDuringSweep: a push of exactly the bytes of a model the
// collection is removing, at an exact point of a sweep (driven by the
// sweep's progress calls, which come between its removals): while the
// blobs go, after the sweep's look for manifests pushed since the mark.
// The model's manifest is gone by then; the push finds its blobs present
// and uploads nothing but the manifest, and the sweep then comes to
// remove those blobs.
//
// The push reuses, so it refreshes (registry.ReuseBlob), and the sweep's
// removals are conditional on the versions the mark saw: the model stays
// whole. Before reuse refreshed and removals were conditional, the
// model lost its blobs (Sweep failed: "pushed during the collection ...
// push it again").
func TestRePushDuringSweep(t *testing.T) {
	for _, phase := range []string{"blobs"} {
		t.Run(phase, func(t *testing.T) {
			s := newScene(t, testRetention)
			s.history(12, 24*time.Hour, 3, 2)
			s.store.advance(40 * 24 * time.Hour)
			keep := s.mustKeep()
			blobs, err := ListBlobs(s.ctx, s.store)
			if err != nil {
				t.Fatal(err)
			}
			plan, err := Mark(s.ctx, s.store, s.pol, Options{Now: s.store.clock(), Blobs: blobs})
			if err != nil {
				t.Fatal(err)
			}
			// The model to push again: an old candidate the plan removes,
			// not the first manifest (so a removal comes before it) and
			// with blobs the plan removes, none of them the first.
			inPlan := map[string]bool{}
			for _, b := range plan.Blobs {
				inPlan[b.Digest] = true
			}
			cand := -1
			for k, m := range plan.Manifests {
				if k == 0 || m.Reason != ReasonOldCandidate || cand >= 0 {
					continue
				}
				i := slices.IndexFunc(s.cands, func(d v1.Hash) bool { return d.String() == m.Digest })
				d, _ := v1.NewHash(m.Digest)
				raw, _, err := s.store.Manifest(s.ctx, encRepo, d)
				if err != nil || i < 0 {
					continue
				}
				var doc manifestDoc
				if err := json.Unmarshal(raw, &doc); err != nil {
					t.Fatal(err)
				}
				ours, first := 0, false
				for _, b := range doc.blobs() {
					if inPlan[b.Digest.String()] {
						ours++
					}
					first = first || b.Digest.String() == plan.Blobs[0].Digest
				}
				if ours > 0 && !first {
					cand = i
				}
			}
			if cand < 0 {
				t.Fatalf("no candidate to push again in %+v", plan.Groups)
			}
			want := s.cands[cand]
			var pushed v1.Hash
			var pushErr error
			pushes := 0
			progress := func(phaseName, name string, done, total int64) {
				if phaseName != "reclaim-blob" || pushes > 0 {
					return
				}
				pushes++
				pushed, pushErr = s.tryPush(cand, "again")
			}
			res, err := Sweep(s.ctx, s.store, plan, SweepOptions{Progress: progress})
			if err != nil {
				t.Fatalf("sweep: %v", err)
			}
			if pushes != 1 || pushErr != nil || pushed != want {
				t.Fatalf("%d pushes; pushed %s (want the same bytes, %s): %v", pushes, pushed, want, pushErr)
			}
			a, err := artifact.ReadArtifact(s.ctx, s.store, registry.Ref{Repository: encRepo, Digest: pushed})
			if err != nil {
				t.Fatalf("the model pushed again is gone: %v", err)
			}
			if probs, err := artifact.CheckModel(s.ctx, s.store, a); err != nil || len(probs) > 0 {
				t.Errorf("the model pushed again lost content: %v %v", err, probs)
			}
			if len(res.Skipped) == 0 {
				t.Errorf("nothing skipped: %+v", res)
			}
			t.Logf("skipped: %+v", res.Skipped)
			s.check(keep)
		})
	}
}
