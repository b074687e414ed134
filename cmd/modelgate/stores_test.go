package main

import (
	"io"
	"log"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/fsouza/fake-gcs-server/fakestorage"
	ggcrregistry "github.com/google/go-containerregistry/pkg/registry"

	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// storeKind is a store location for the CLI, with whether tags move by a
// true compare-and-swap there.
type storeKind struct {
	name  string
	loc   string
	exact bool
}

// everyStore starts the remote stores on loopback and returns one
// location of each kind (prefix distinguishes uses): the local store,
// go-containerregistry's in-memory registry over HTTP, fake-gcs-server over
// HTTP (reached through STORAGE_EMULATOR_HOST, as the real client does),
// and Debian's docker-registry when .ci/services.sh started it.
func everyStore(t *testing.T, prefix string) []storeKind {
	t.Helper()
	reg := httptest.NewServer(ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(nopLogger())))
	t.Cleanup(reg.Close)
	// The same registry code behind a handler that refuses the catalog, as
	// many hosted registries do.
	noCat := httptest.NewServer(storetest.NoCatalog(ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(nopLogger()))))
	t.Cleanup(noCat.Close)
	gcs, err := fakestorage.NewServerWithOptions(fakestorage.Options{Scheme: "http", Host: "127.0.0.1", PublicHost: "127.0.0.1", Writer: io.Discard})
	if err != nil {
		t.Fatalf("starting fake-gcs-server: %v", err)
	}
	t.Cleanup(gcs.Stop)
	gcs.CreateBucketWithOpts(fakestorage.CreateBucketOpts{Name: "podcast-models"})
	t.Setenv("STORAGE_EMULATOR_HOST", strings.TrimPrefix(gcs.URL(), "http://"))
	kinds := []storeKind{
		{"local", filepath.Join(t.TempDir(), "store"), true},
		{"registry", "oci://" + strings.TrimPrefix(reg.URL, "http://") + "/" + prefix, false},
		{"gcs", "gs://podcast-models/" + prefix, true},
		{"registry-no-catalog", "oci://" + strings.TrimPrefix(noCat.URL, "http://") + "/" + prefix, false},
	}
	if addr := os.Getenv("MODELGATE_TEST_REGISTRY"); addr != "" {
		t.Setenv("MODELGATE_REGISTRY_USER", os.Getenv("MODELGATE_TEST_REGISTRY_USER"))
		t.Setenv("MODELGATE_REGISTRY_PASSWORD", os.Getenv("MODELGATE_TEST_REGISTRY_PASSWORD"))
		// The registry outlives the test process: a prefix of its own per
		// run keeps a rerun from finding an earlier run's tags.
		run := strconv.FormatInt(time.Now().UnixNano(), 36)
		kinds = append(kinds, storeKind{"docker-registry", "oci://" + addr + "/" + prefix + "-" + run, false})
	} else if os.Getenv("CI") != "" && os.Getenv("MODELGATE_REQUIRE_SERVICES") == "1" {
		t.Fatal("MODELGATE_TEST_REGISTRY is not set: .ci/services.sh should have started docker-registry")
	}
	return kinds
}

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
		return mustMG(t, u.store, "ls", "--json", "tiny-encoder").stdout + mustMG(t, u.store, "ls", "--json", "tiny-scorer").stdout
	}
	_, _, promote := u.candidates()
	alone := append([]string(nil), promote[:4]...) // promote tiny-encoder:vN --to tiny-encoder:prod
	before := lsTags()
	r := mg(t, u.store, append(alone, "--key", u.key("rita"))...)
	wantExit(t, r, 4, "is consumed by tiny-scorer:prod (scorer ", "--with SCORER-CANDIDATE=tiny-scorer:prod")
	if lsTags() != before {
		t.Fatal("the refused promote moved a tag")
	}
	mustMG(t, u.store, promote...)
	if lsTags() == before {
		t.Fatal("the release of both tags moved nothing")
	}
	u.logsVerify("after the release without a catalog")
}

func nopLogger() *log.Logger { return log.New(io.Discard, "", 0) }
