package clitest

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

// StoreKind is a store location for the command line, with whether tags
// move by a true compare-and-swap there.
type StoreKind struct {
	Name  string
	Loc   string
	Exact bool
}

// EveryStore starts the remote stores on loopback and returns one
// location of each kind (prefix distinguishes uses): the local store,
// go-containerregistry's in-memory registry over HTTP, fake-gcs-server over
// HTTP (reached through STORAGE_EMULATOR_HOST, as the real client does),
// the in-memory registry behind a handler that refuses the catalog, and
// Debian's docker-registry when .ci/services.sh started it (in CI with
// MODELGATE_REQUIRE_SERVICES=1 its absence fails the test).
func EveryStore(t *testing.T, prefix string) []StoreKind {
	t.Helper()
	reg := httptest.NewServer(ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(NopLogger())))
	t.Cleanup(reg.Close)
	// The same registry code behind a handler that refuses the catalog, as
	// many hosted registries do.
	noCat := httptest.NewServer(storetest.NoCatalog(ggcrregistry.New(ggcrregistry.WithReferrersSupport(true), ggcrregistry.Logger(NopLogger()))))
	t.Cleanup(noCat.Close)
	gcs, err := fakestorage.NewServerWithOptions(fakestorage.Options{Scheme: "http", Host: "127.0.0.1", PublicHost: "127.0.0.1", Writer: io.Discard})
	if err != nil {
		t.Fatalf("starting fake-gcs-server: %v", err)
	}
	t.Cleanup(gcs.Stop)
	gcs.CreateBucketWithOpts(fakestorage.CreateBucketOpts{Name: "podcast-models"})
	t.Setenv("STORAGE_EMULATOR_HOST", strings.TrimPrefix(gcs.URL(), "http://"))
	kinds := []StoreKind{
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
		kinds = append(kinds, StoreKind{"docker-registry", "oci://" + addr + "/" + prefix + "-" + run, false})
	} else if os.Getenv("CI") != "" && os.Getenv("MODELGATE_REQUIRE_SERVICES") == "1" {
		t.Fatal("MODELGATE_TEST_REGISTRY is not set: .ci/services.sh should have started docker-registry")
	}
	return kinds
}

// NopLogger discards what it is given (the in-memory registry's log).
func NopLogger() *log.Logger { return log.New(io.Discard, "", 0) }
