package policy

import (
	"encoding/json"
	"strings"
	"testing"
	"time"

	"github.com/google/go-cmp/cmp"

	"github.com/modelgate/modelgate/schemas"
)

const retentionPolicy = minimalScorer + `retention:
  grace: 48h
  repositories:
    - repository: promo-scorer
      keepCandidates: 3
      expireTags:
        - {tags: "ci-*", after: 720h}
        - {tags: "*", after: 2160h}
    - repository: "ci/*"
`

func TestRetentionParsed(t *testing.T) {
	p, err := Parse("r.yaml", []byte(retentionPolicy))
	if err != nil {
		t.Fatal(err)
	}
	want := &Retention{Grace: 48 * time.Hour, Repositories: []RepositoryRetention{
		{Pattern: "promo-scorer", KeepCandidates: 3, ExpireTags: []TagExpiry{{"ci-*", 720 * time.Hour}, {"*", 2160 * time.Hour}}},
		{Pattern: "ci/*", KeepCandidates: defaultKeepCandidates},
	}}
	if d := cmp.Diff(want, p.Retention); d != "" {
		t.Fatalf("retention (-want +got):\n%s", d)
	}
	for repo, pat := range map[string]string{"promo-scorer": "promo-scorer", "ci/promo": "ci/*", "ci/a/b": "", "listener-encoder": ""} {
		got := p.Retention.For(repo)
		if (got == nil) != (pat == "") || (got != nil && got.Pattern != pat) {
			t.Errorf("For(%q) = %+v, want pattern %q", repo, got, pat)
		}
	}
	r := p.Retention.For("promo-scorer")
	if e := r.Expiry("ci-123"); e == nil || e.Pattern != "ci-*" {
		t.Errorf("ci-123 expires by %+v, want the first matching pattern ci-*", e)
	}
	if e := p.Retention.For("ci/x").Expiry("ci-123"); e != nil {
		t.Errorf("a repository without expireTags expires ci-123 by %+v", e)
	}

	// A policy without retention has none: nothing is eligible.
	q, err := Parse("s.yaml", []byte(minimalScorer))
	if err != nil {
		t.Fatal(err)
	}
	if q.Retention != nil || q.Retention.For("promo-scorer") != nil {
		t.Errorf("a policy without retention has %+v", q.Retention)
	}
	// Retention is part of the policy's identity.
	if q.Digest() == p.Digest() {
		t.Error("adding retention left the digest unchanged")
	}
	if d := Diff(q, p); len(d) != 1 || !strings.HasPrefix(d[0], "/retention: added") {
		t.Errorf("Diff = %q", d)
	}
}

func TestRetentionDefaults(t *testing.T) {
	p, err := Parse("r.yaml", []byte(minimalScorer+"retention:\n  repositories:\n    - repository: promo-scorer\n"))
	if err != nil {
		t.Fatal(err)
	}
	r := p.Retention
	if r.Grace != defaultGrace || r.Repositories[0].KeepCandidates != defaultKeepCandidates || r.Repositories[0].ExpireTags != nil {
		t.Errorf("defaults %+v", r)
	}
	// The schema documents the same defaults.
	raw, err := schemas.Raw(schemas.Policy)
	if err != nil {
		t.Fatal(err)
	}
	var s struct {
		Defs map[string]struct {
			Properties map[string]struct {
				Default any `json:"default"`
			} `json:"properties"`
		} `json:"$defs"`
	}
	if err := json.Unmarshal(raw, &s); err != nil {
		t.Fatal(err)
	}
	if g := s.Defs["retention"].Properties["grace"].Default; g != "168h" || defaultGrace != 168*time.Hour {
		t.Errorf("schema grace default %v, Parse applies %v", g, defaultGrace)
	}
	if k := s.Defs["repositoryRetention"].Properties["keepCandidates"].Default; k != float64(defaultKeepCandidates) {
		t.Errorf("schema keepCandidates default %v, Parse applies %v", k, defaultKeepCandidates)
	}
}

func TestRetentionMalformed(t *testing.T) {
	for _, c := range []struct {
		name, retention string
		want            []string
	}{
		{"no repositories", "retention: {grace: 48h}\n", []string{"/retention: missing properties: 'repositories'"}},
		{"unknown field", "retention:\n  repositories: [{repository: a, keep: 3}]\n", []string{"/retention/repositories/0"}},
		{"bad grace", "retention:\n  grace: soon\n  repositories: [{repository: a}]\n", []string{"/retention/grace: \"soon\" is not a duration"}},
		{"short grace", "retention:\n  grace: 10m\n  repositories: [{repository: a}]\n", []string{"/retention/grace: \"10m\" is shorter than 1h0m0s"}},
		{"negative keep", "retention:\n  repositories: [{repository: a, keepCandidates: -1}]\n", []string{"/retention/repositories/0/keepCandidates"}},
		{"bad pattern", "retention:\n  repositories: [{repository: \"a[\"}]\n", []string{"/retention/repositories/0/repository: \"a[\" is not a valid pattern"}},
		{"duplicate", "retention:\n  repositories: [{repository: a}, {repository: a}]\n", []string{"/retention/repositories/1/repository: \"a\" is already given by /retention/repositories/0"}},
		{"expiry below grace", "retention:\n  grace: 48h\n  repositories: [{repository: a, expireTags: [{tags: \"ci-*\", after: 24h}]}]\n",
			[]string{"/retention/repositories/0/expireTags/0/after: \"24h\" is shorter than the grace period 48h0m0s"}},
		{"two problems", "retention:\n  repositories: [{repository: \"[\", expireTags: [{tags: \"[\", after: 1y}]}]\n",
			[]string{"/retention/repositories/0/repository", "/retention/repositories/0/expireTags/0/tags", "/retention/repositories/0/expireTags/0/after"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			_, err := Parse("r.yaml", []byte(minimalScorer+c.retention))
			if err == nil {
				t.Fatal("accepted")
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q does not say %q", err, w)
				}
			}
		})
	}
}
