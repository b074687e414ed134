package storesuite

import (
	"encoding/json"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"testing"

	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"

	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// TestFullFlowOnEveryStore: the demo's whole story — push, gate, approve,
// promote, refusals, rollback, log — then log and verify again, on each
// store kind.
func TestFullFlowOnEveryStore(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the demo on every store kind")
	}
	for _, k := range everyStore(t, "flow") {
		t.Run(k.name, func(t *testing.T) {
			work := filepath.Join(t.TempDir(), "work")
			r := mustMG(t, k.loc, "demo", "--work", work)
			for _, s := range []string{"promoted promo-scorer:prod", "rolled back promo-scorer:prod", "every record, signature and link verified"} {
				if !strings.Contains(r.stdout, s) {
					t.Errorf("%s: the demo story lacks %q", k.name, s)
				}
			}
			mustMG(t, k.loc, "log", "promo-scorer:prod", "--policy", filepath.Join(work, "policies", "promo-scorer.yaml"))
			// Untag a candidate (docker-registry deletes tags only with
			// their manifest: the output must say so), and refuse the
			// released tag; verify below runs after the removal.
			var un struct{ ManifestKept bool }
			if err := json.Unmarshal([]byte(mustMG(t, k.loc, "untag", "promo-scorer:cand-over-budget", "--json").stdout), &un); err != nil {
				t.Fatal(err)
			}
			if un.ManifestKept == (k.name == "docker-registry") {
				t.Errorf("%s: untag says manifestKept %v", k.name, un.ManifestKept)
			}
			if r := mg(t, k.loc, "show", "promo-scorer:cand-over-budget"); r.code != 2 {
				t.Errorf("%s: show of the removed tag: exit %d, want 2", k.name, r.code)
			}
			if r := mg(t, k.loc, "untag", "promo-scorer:prod"); r.code != 4 || !strings.Contains(r.stderr, "release log") {
				t.Errorf("%s: untag of the released tag: exit %d, want 4\n%s", k.name, r.code, r.stderr)
			}
			if k.name == "registry-no-catalog" {
				r := mg(t, k.loc, "verify")
				if r.code != 2 || !strings.Contains(r.stderr, "does not list repositories") || !strings.Contains(r.stderr, "modelgate verify NAME") {
					t.Errorf("verify without names on a store without a catalog: exit %d, stderr %q; want 2, explained", r.code, r.stderr)
				}
				r = mg(t, k.loc, "ls")
				if r.code != 2 || !strings.Contains(r.stderr, "does not list repositories") || !strings.Contains(r.stderr, "modelgate ls NAME") {
					t.Errorf("ls without a name on a store without a catalog: exit %d, stderr %q; want 2, explained", r.code, r.stderr)
				}
				mustMG(t, k.loc, "ls", "promo-scorer")
				mustMG(t, k.loc, "verify", "promo-scorer", "listener-encoder", "promo-holdout")
				return
			}
			mustMG(t, k.loc, "verify")
		})
	}
}

// TestPromoteRaceOnEveryStore: 16 concurrent promotions of one tag on each
// store kind; exactly one wins where tags move by compare-and-swap, and
// on a registry no lost race goes unnoticed (see racePromotes).
func TestPromoteRaceOnEveryStore(t *testing.T) {
	if testing.Short() {
		t.Skip("16 promote processes per store kind")
	}
	for _, k := range everyStore(t, "race") {
		if k.name == "local" {
			continue // TestConcurrentPromote
		}
		if k.name == "registry-no-catalog" {
			// The same tag semantics as "registry"; racePromotes checks the
			// outcome with a whole-store ls, which such a registry refuses.
			// Encoder promotes there need no scorer policy any more
			// (TestEncoderAloneRefusedWithoutCatalog).
			continue
		}
		t.Run(k.name, func(t *testing.T) {
			racePromotes(t, newReleaseWorldAt(t, 0, k.loc), k.exact)
		})
	}
}

// TestEncoderAloneRefusedWithoutCatalog: on a registry that does not list
// its repositories, an encoder promote given no scorer policy still finds
// the released scorer tag that reads its code (through the marker the
// scorer's release left on the encoder) and refuses, exit 4, naming it,
// with nothing moved; the release of both then goes through. Before the
// markers the promote exited 2, asking for the scorers' policies.
func TestEncoderAloneRefusedWithoutCatalog(t *testing.T) {
	noCat := httptest.NewServer(storetest.NoCatalog(ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(nopLogger()))))
	t.Cleanup(noCat.Close)
	u := newUnitWorld(t, "oci://"+strings.TrimPrefix(noCat.URL, "http://")+"/alone")
	lsTags := func() string {
		return mustMG(t, u.Store, "ls", "--json", "tiny-encoder").stdout + mustMG(t, u.Store, "ls", "--json", "tiny-scorer").stdout
	}
	_, _, promote := u.candidates()
	alone := append([]string(nil), promote[:4]...) // promote tiny-encoder:vN --to tiny-encoder:prod
	before := lsTags()
	r := mg(t, u.Store, append(alone, "--key", u.Key("rita"))...)
	wantExit(t, r, 4, "is consumed by tiny-scorer:prod (scorer ", "--with SCORER-CANDIDATE=tiny-scorer:prod")
	if lsTags() != before {
		t.Fatal("the refused promote moved a tag")
	}
	mustMG(t, u.Store, promote...)
	if lsTags() == before {
		t.Fatal("the release of both tags moved nothing")
	}
	u.logsVerify("after the release without a catalog")
}
