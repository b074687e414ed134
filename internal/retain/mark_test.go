package retain

import (
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

const testRetention = `retention:
  grace: 48h
  repositories:
    - repository: listener-encoder
      keepCandidates: 3
      expireTags:
        - {tags: "ci-*", after: 720h}
`

func manifestsByReason(p *Plan) map[string]map[string]bool {
	out := map[string]map[string]bool{}
	for _, m := range p.Manifests {
		if out[m.Reason] == nil {
			out[m.Reason] = map[string]bool{}
		}
		out[m.Reason][m.Digest] = true
	}
	return out
}

func TestMarkSmallHistory(t *testing.T) {
	s := newScene(t, testRetention)
	// 12 candidates a day apart; every third promoted; the second
	// promotion rolled back.
	s.history(12, 24*time.Hour, 3, 2)
	s.store.advance(40 * 24 * time.Hour)
	plan, err := Mark(s.ctx, s.store, s.pol, Options{Now: s.store.clock()})
	if err != nil {
		t.Fatal(err)
	}
	by := manifestsByReason(plan)
	released := map[v1.Hash]bool{}
	for _, d := range s.released {
		released[d] = true
	}
	all := map[string]bool{}
	for _, m := range plan.Manifests {
		all[m.Digest] = true
	}
	for _, d := range s.released {
		if all[d.String()] {
			t.Errorf("released model %s is eligible", d)
		}
	}
	// The candidates nothing else keeps: neither released nor the last
	// (latest names it); the ci-<i> ones are among them, their tags being
	// older than 720h.
	var pool []int
	for i, c := range s.cands {
		if !released[c] && i != len(s.cands)-1 {
			pool = append(pool, i)
		}
	}
	// The newest three are kept, the rest eligible: as expired-tag for
	// ci-0, as old candidates for the others.
	for k, i := range pool {
		c := s.cands[i].String()
		want := ""
		if k < len(pool)-3 {
			want = ReasonOldCandidate
			if i%10 == 0 {
				want = ReasonExpiredTag
			}
		}
		got := ""
		for r, set := range by {
			if set[c] {
				got = r
			}
		}
		if got != want {
			t.Errorf("candidate %d (%s): eligible as %q, want %q", i, c, got, want)
		}
	}
	// Both ci tags are older than 720h: they expire, though ci-10's model
	// is kept as one of the newest candidates.
	if len(plan.Tags) != 2 || plan.Tags[0].Tag != "ci-0" || plan.Tags[1].Tag != "ci-10" {
		t.Errorf("expired tags %+v, want ci-0 and ci-10", plan.Tags)
	}
	// Every eligible candidate's gate report goes with it, and nothing
	// else is eligible.
	if got, want := len(by[ReasonReferrerOfEligible]), len(by[ReasonOldCandidate])+len(by[ReasonExpiredTag]); got != want {
		t.Errorf("%d referrers eligible, want one report per eligible candidate (%d)", got, want)
	}
	if len(by) != 3 {
		t.Errorf("reasons %v", by)
	}
	if len(plan.Blobs) == 0 || plan.Bytes <= 0 {
		t.Errorf("no blobs or bytes: %+v", plan.Groups)
	}
	// Each eligible candidate has its own decoder tensor blob.
	var tensorBlobs int
	for _, g := range plan.Groups {
		if g.Reason == ReasonOldCandidate {
			tensorBlobs = g.Blobs
		}
	}
	if tensorBlobs < len(by[ReasonOldCandidate]) {
		t.Errorf("%d blobs of old candidates for %d candidates", tensorBlobs, len(by[ReasonOldCandidate]))
	}
}

func TestMarkNothingWithoutRetention(t *testing.T) {
	s := newScene(t, "")
	s.history(6, 24*time.Hour, 3, 5)
	s.store.advance(400 * 24 * time.Hour)
	plan, err := Mark(s.ctx, s.store, s.pol, Options{Now: s.store.clock()})
	if err != nil {
		t.Fatal(err)
	}
	if len(plan.Manifests)+len(plan.Tags)+len(plan.Blobs) != 0 || plan.Retention {
		t.Errorf("a policy without retention made eligible %+v", plan)
	}
	if plan.Kept.Reasons[KeepNoRule] == 0 {
		t.Errorf("kept %+v", plan.Kept)
	}
}

func TestMarkGrace(t *testing.T) {
	s := newScene(t, "retention:\n  grace: 720h\n  repositories: [{repository: listener-encoder, keepCandidates: 0}]\n")
	s.history(6, 24*time.Hour, 100, 100)
	// 10 days after the last push: every candidate is younger than the
	// 30-day grace period.
	s.store.advance(10 * 24 * time.Hour)
	plan, err := Mark(s.ctx, s.store, s.pol, Options{Now: s.store.clock()})
	if err != nil {
		t.Fatal(err)
	}
	if len(plan.Manifests) != 0 {
		t.Errorf("young manifests eligible: %+v", plan.Manifests)
	}
	s.store.advance(30 * 24 * time.Hour)
	plan, err = Mark(s.ctx, s.store, s.pol, Options{Now: s.store.clock()})
	if err != nil {
		t.Fatal(err)
	}
	// ci-0 is tagged and never expires here, latest names the last; the
	// other four and their reports go.
	if by := manifestsByReason(plan); len(by[ReasonOldCandidate]) != 4 || len(by[ReasonReferrerOfEligible]) != 4 {
		t.Errorf("eligible %v", by)
	}
}

// TestMarkKeepsTagsAPolicyNames: a tag the policy names (here a holdout
// tag) does not expire, though an expireTags pattern matches it and its
// artifact is old: removing it would stop every gate of the rule. The same
// tag expires when no policy names it.
func TestMarkKeepsTagsAPolicyNames(t *testing.T) {
	s := newScene(t, "retention:\n  grace: 48h\n  repositories: [{repository: listener-encoder, keepCandidates: 0, expireTags: [{tags: '*', after: 720h}]}]\n")
	s.history(12, 24*time.Hour, 3, 2)
	s.store.advance(40 * 24 * time.Hour)
	expired := func(p *Plan) map[string]bool {
		out := map[string]bool{}
		for _, tg := range p.Tags {
			out[tg.Tag] = true
		}
		return out
	}
	plan, err := Mark(s.ctx, s.store, s.pol, Options{Now: s.store.clock()})
	if err != nil {
		t.Fatal(err)
	}
	if e := expired(plan); !e["ci-0"] || !e["ci-10"] || e["prod"] {
		t.Fatalf("without a policy naming it: expired tags %v, want ci-0 and ci-10 (and never prod)", e)
	}
	named := *s.pol
	named.Rules = append([]policy.Rule(nil), s.pol.Rules...)
	named.Rules[0].HoldoutRef = &registry.Ref{Repository: encRepo, Tag: "ci-0"}
	plan, err = Mark(s.ctx, s.store, &named, Options{Now: s.store.clock()})
	if err != nil {
		t.Fatal(err)
	}
	if e := expired(plan); e["ci-0"] || !e["ci-10"] {
		t.Errorf("with a policy naming ci-0: expired tags %v, want ci-10 only", e)
	}
	ci0 := s.cands[0].String()
	for _, m := range plan.Manifests {
		if m.Digest == ci0 {
			t.Errorf("the model ci-0 names is eligible (%s)", m.Reason)
		}
	}
}
