package registry_test

import (
	"context"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"regexp"
	"strings"
	"testing"

	"github.com/google/go-containerregistry/pkg/authn"
	"github.com/google/go-containerregistry/pkg/name"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"
	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/remote"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// bookkeeping counts the tags of full on the registry at addr by kind
// (the reserved names of README "Bookkeeping tags"), listing them with
// go-containerregistry's own client, not the store's.
func bookkeeping(t *testing.T, addr, full string, auth authn.Authenticator) map[string]int {
	t.Helper()
	repo, err := name.NewRepository(addr+"/"+full, name.Insecure)
	if err != nil {
		t.Fatal(err)
	}
	tags, err := remote.List(repo, remote.WithAuth(auth))
	if err != nil {
		t.Fatal(err)
	}
	kinds := map[string]*regexp.Regexp{
		"keep":  regexp.MustCompile(`^sha256-[a-f0-9]{64}\.keep$`),
		"link":  regexp.MustCompile(`^sha256-[a-f0-9]{64}\.[a-f0-9]{56}$`),
		"index": regexp.MustCompile(`^sha256-[a-f0-9]{64}$`),
		"push":  regexp.MustCompile(`^sha256-[a-f0-9]{64}\.p[0-9]+\.[a-f0-9]{8}$`),
	}
	n := map[string]int{}
	for _, tag := range tags {
		kind := "user"
		for k, re := range kinds {
			if re.MatchString(tag) {
				kind = k
			}
		}
		n[kind]++
	}
	return n
}

// pushHistory writes what one user tag gathers: a model tagged prod, a
// gate report and two approvals of it, and a marker on the report (five
// manifests, four of them referrers of two subjects).
func pushHistory(t *testing.T, s registry.Store) {
	t.Helper()
	model := storetest.Push(t, s, "promo-scorer", "prod", storetest.NewArtifact(1, "application/vnd.example.model", nil, nil))
	report := storetest.Push(t, s, "promo-scorer", "", storetest.NewArtifact(2, "application/vnd.example.report", &model, nil))
	for i := range 2 {
		storetest.Push(t, s, "promo-scorer", "", storetest.NewArtifact(uint64(3+i), "application/vnd.example.approval", &model, nil))
	}
	storetest.Push(t, s, "promo-scorer", "", storetest.NewArtifact(5, "application/vnd.example.marker", &report, nil))
	for _, c := range []struct {
		subject v1.Descriptor
		want    int
	}{{model, 3}, {report, 1}} {
		ds, err := s.Referrers(context.Background(), "promo-scorer", c.subject.Digest, "")
		if err != nil || len(ds) != c.want {
			t.Fatalf("Referrers of %s: %d, %v; want %d", c.subject.Digest, len(ds), err, c.want)
		}
	}
}

// TestRemoteBookkeepingTags: what each kind of registry gets besides the
// user's tag (README "Bookkeeping tags"). With the referrers API
// (distribution spec v1.1; go-containerregistry's in-memory registry has
// it): one keep tag per manifest, and one push-time tag per write (five
// manifests put, one tagged), nothing else. Without it (the same
// registry with the API off; Debian's docker-registry 2.8): also one link
// tag per referrer and the spec's fallback index per subject.
func TestRemoteBookkeepingTags(t *testing.T) {
	want := map[string]map[string]int{
		"referrers API": {"user": 1, "keep": 5, "push": 6},
		"tag fallback":  {"user": 1, "keep": 5, "link": 4, "index": 2, "push": 6},
	}
	for _, c := range []struct {
		name, mode string
		api        bool
	}{{"in-memory with the referrers API", "referrers API", true}, {"in-memory without it", "tag fallback", false}} {
		t.Run(c.name, func(t *testing.T) {
			addr := memRegistry(t, c.api)
			pushHistory(t, openRemote(t, addr+"/tags", registry.WithRemoteAuth(authn.Anonymous)))
			got := bookkeeping(t, addr, "tags/promo-scorer", authn.Anonymous)
			if !sameCounts(got, want[c.mode]) {
				t.Errorf("tags by kind: %v, want %v", got, want[c.mode])
			}
		})
	}
	t.Run("docker-registry", func(t *testing.T) {
		addr, auth := serviceRegistry(t)
		prefix := uniquePrefix(t)
		pushHistory(t, openRemote(t, addr+"/"+prefix, registry.WithRemoteAuth(auth)))
		got := bookkeeping(t, addr, prefix+"/promo-scorer", auth)
		if !sameCounts(got, want["tag fallback"]) {
			t.Errorf("tags by kind: %v, want %v", got, want["tag fallback"])
		}
	})
}

// TestRemoteReferrersWrittenBeforeTheAPI: a registry that gained the
// referrers API after modelgate wrote referrers through the tag fallback
// (its API does not know them, as distribution indexes referrers only when
// they are put) still gives them: the store reads link tags and the
// fallback index while the repository has any.
func TestRemoteReferrersWrittenBeforeTheAPI(t *testing.T) {
	h := ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(log.New(io.Discard, "", 0)))
	before := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if strings.Contains(r.URL.Path, "/referrers/") {
			http.NotFound(w, r) // no API yet, as docker-registry 2.8
			return
		}
		h.ServeHTTP(w, r)
	}))
	t.Cleanup(before.Close)
	after := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if strings.Contains(r.URL.Path, "/referrers/") {
			w.Header().Set("Content-Type", "application/vnd.oci.image.index.v1+json")
			io.WriteString(w, `{"schemaVersion":2,"mediaType":"application/vnd.oci.image.index.v1+json","manifests":[]}`)
			return
		}
		h.ServeHTTP(w, r)
	}))
	t.Cleanup(after.Close)
	pushHistory(t, openRemote(t, strings.TrimPrefix(before.URL, "http://")+"/old", registry.WithRemoteAuth(authn.Anonymous)))
	s := openRemote(t, strings.TrimPrefix(after.URL, "http://")+"/old", registry.WithRemoteAuth(authn.Anonymous))
	model, err := s.Resolve(context.Background(), "promo-scorer", "prod")
	if err != nil {
		t.Fatal(err)
	}
	ds, err := s.Referrers(context.Background(), "promo-scorer", model.Digest, "")
	if err != nil || len(ds) != 3 {
		t.Fatalf("referrers written before the API: %d, %v; want 3", len(ds), err)
	}
}

func sameCounts(a, b map[string]int) bool {
	if len(a) != len(b) {
		return false
	}
	for k, v := range a {
		if b[k] != v {
			return false
		}
	}
	return true
}
