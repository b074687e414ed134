package storesuite

import (
	"encoding/json"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"

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
	for _, k := range clitest.EveryStore(t, "flow") {
		t.Run(k.Name, func(t *testing.T) {
			work := filepath.Join(t.TempDir(), "work")
			r := clitest.MustMG(t, k.Loc, "demo", "--work", work)
			for _, s := range []string{"promoted promo-scorer:prod", "rolled back promo-scorer:prod", "every record, signature and link verified"} {
				if !strings.Contains(r.Stdout, s) {
					t.Errorf("%s: the demo story lacks %q", k.Name, s)
				}
			}
			clitest.MustMG(t, k.Loc, "log", "promo-scorer:prod", "--policy", filepath.Join(work, "policies", "promo-scorer.yaml"))
			// Untag a candidate (docker-registry deletes tags only with
			// their manifest: the output must say so), and refuse the
			// released tag; verify below runs after the removal.
			var un struct{ ManifestKept bool }
			if err := json.Unmarshal([]byte(clitest.MustMG(t, k.Loc, "untag", "promo-scorer:cand-over-budget", "--json").Stdout), &un); err != nil {
				t.Fatal(err)
			}
			if un.ManifestKept == (k.Name == "docker-registry") {
				t.Errorf("%s: untag says manifestKept %v", k.Name, un.ManifestKept)
			}
			if r := clitest.MG(t, k.Loc, "show", "promo-scorer:cand-over-budget"); r.Code != 2 {
				t.Errorf("%s: show of the removed tag: exit %d, want 2", k.Name, r.Code)
			}
			if r := clitest.MG(t, k.Loc, "untag", "promo-scorer:prod"); r.Code != 4 || !strings.Contains(r.Stderr, "release log") {
				t.Errorf("%s: untag of the released tag: exit %d, want 4\n%s", k.Name, r.Code, r.Stderr)
			}
			if k.Name == "registry-no-catalog" {
				r := clitest.MG(t, k.Loc, "verify")
				if r.Code != 2 || !strings.Contains(r.Stderr, "does not list repositories") || !strings.Contains(r.Stderr, "modelgate verify NAME") {
					t.Errorf("verify without names on a store without a catalog: exit %d, stderr %q; want 2, explained", r.Code, r.Stderr)
				}
				r = clitest.MG(t, k.Loc, "ls")
				if r.Code != 2 || !strings.Contains(r.Stderr, "does not list repositories") || !strings.Contains(r.Stderr, "modelgate ls NAME") {
					t.Errorf("ls without a name on a store without a catalog: exit %d, stderr %q; want 2, explained", r.Code, r.Stderr)
				}
				clitest.MustMG(t, k.Loc, "ls", "promo-scorer")
				clitest.MustMG(t, k.Loc, "verify", "promo-scorer", "listener-encoder", "promo-holdout")
				return
			}
			clitest.MustMG(t, k.Loc, "verify")
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
	for _, k := range clitest.EveryStore(t, "race") {
		if k.Name == "local" {
			continue // TestConcurrentPromote
		}
		if k.Name == "registry-no-catalog" {
			// The same tag semantics as "registry"; racePromotes checks the
			// outcome with a whole-store ls, which such a registry refuses.
			// Encoder promotes there need no scorer policy any more
			// (TestEncoderAloneRefusedWithoutCatalog).
			continue
		}
		t.Run(k.Name, func(t *testing.T) {
			racePromotes(t, clitest.NewWorldAt(t, 0, k.Loc), k.Exact)
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
	noCat := httptest.NewServer(storetest.NoCatalog(ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(clitest.NopLogger()))))
	t.Cleanup(noCat.Close)
	u := newUnitWorld(t, "oci://"+strings.TrimPrefix(noCat.URL, "http://")+"/alone")
	lsTags := func() string {
		return clitest.MustMG(t, u.Store, "ls", "--json", "tiny-encoder").Stdout + clitest.MustMG(t, u.Store, "ls", "--json", "tiny-scorer").Stdout
	}
	_, _, promote := u.candidates()
	alone := append([]string(nil), promote[:4]...) // promote tiny-encoder:vN --to tiny-encoder:prod
	before := lsTags()
	r := clitest.MG(t, u.Store, append(alone, "--key", u.Key("rita"))...)
	clitest.WantExit(t, r, 4, "is consumed by tiny-scorer:prod (scorer ", "--with SCORER-CANDIDATE=tiny-scorer:prod")
	if lsTags() != before {
		t.Fatal("the refused promote moved a tag")
	}
	clitest.MustMG(t, u.Store, promote...)
	if lsTags() == before {
		t.Fatal("the release of both tags moved nothing")
	}
	u.logsVerify("after the release without a catalog")
}
