package main

import (
	"log"
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"
)

// The helpers of the black-box tests live in internal/clitest (shared with
// the other packages that run the built binary); these are their names in
// this package.

// mgBinary is the modelgate executable built once for this package.
var mgBinary string

func TestMain(m *testing.M) {
	clitest.Main(m, func() { mgBinary = clitest.Binary })
}

type result struct {
	code           int
	stdout, stderr string
}

func fromResult(r clitest.Result) result { return result{r.Code, r.Stdout, r.Stderr} }

// mg runs the built binary against store with args.
func mg(t *testing.T, store string, args ...string) result {
	t.Helper()
	return fromResult(clitest.MG(t, store, args...))
}

// mustMG is mg that fails the test unless modelgate exits 0.
func mustMG(t *testing.T, store string, args ...string) result {
	t.Helper()
	return fromResult(clitest.MustMG(t, store, args...))
}

// fixtures writes the tiny encoder and scorer into a fresh directory.
func fixtures(t *testing.T) (encDir, scorerDir string) {
	t.Helper()
	return clitest.Fixtures(t)
}

// listing describes every file of a directory tree (path, size, content)
// so tests can assert a store did not change.
func listing(t *testing.T, root string) string {
	t.Helper()
	return clitest.Listing(t, root)
}

func countBlobs(t *testing.T, store string) int {
	t.Helper()
	return clitest.CountBlobs(t, store)
}

// storeKind is a store location for the CLI, with whether tags move by a
// true compare-and-swap there.
type storeKind struct {
	name  string
	loc   string
	exact bool
}

// everyStore returns one location of each store kind (clitest.EveryStore).
func everyStore(t *testing.T, prefix string) []storeKind {
	t.Helper()
	var out []storeKind
	for _, k := range clitest.EveryStore(t, prefix) {
		out = append(out, storeKind{k.Name, k.Loc, k.Exact})
	}
	return out
}

func nopLogger() *log.Logger { return clitest.NopLogger() }
