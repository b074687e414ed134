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

// releaseWorld is a store with tiny encoder variants, keys and a policy
// for tiny-encoder:prod (clitest.World), its Approve and Promote giving
// this package's result.
type releaseWorld struct{ *clitest.World }

func newReleaseWorld(t *testing.T, required int) *releaseWorld {
	t.Helper()
	return &releaseWorld{clitest.NewWorld(t, required)}
}

// newReleaseWorldAt is newReleaseWorld on the store at location store.
func newReleaseWorldAt(t *testing.T, required int, store string) *releaseWorld {
	t.Helper()
	return &releaseWorld{clitest.NewWorldAt(t, required, store)}
}

func (w *releaseWorld) Approve(cand, who string, args ...string) result {
	return fromResult(w.World.Approve(cand, who, args...))
}

func (w *releaseWorld) Promote(cand string, args ...string) result {
	return fromResult(w.World.Promote(cand, args...))
}

// nameVariant writes the tiny encoder under another spec name: same
// weights and probes, another digest.
func nameVariant(t *testing.T, root string, i int) string {
	t.Helper()
	return clitest.NameVariant(t, root, i)
}

func wantExit(t *testing.T, r result, code int, fragments ...string) {
	t.Helper()
	clitest.WantExit(t, clitest.Result{Code: r.code, Stdout: r.stdout, Stderr: r.stderr}, code, fragments...)
}

// storeTags maps every NAME:TAG of the store to its digest.
func storeTags(t *testing.T, store string) map[string]string {
	t.Helper()
	return clitest.StoreTags(t, store)
}

// mustVerify runs verify; it must exit 0 (hints allowed).
func mustVerify(t *testing.T, store, what string) {
	t.Helper()
	clitest.MustVerify(t, store, what)
}

// bigEncoder writes an encoder with a vocabulary large enough that a push
// takes long enough to be killed part way (a few MB of tensors).
func bigEncoder(t *testing.T, root, name string, seed uint64, vocab int) string {
	t.Helper()
	return clitest.BigEncoder(t, root, name, seed, vocab)
}

// listingDiff shows the lines of two listings that differ (file names
// and sizes only).
func listingDiff(a, b string) string { return clitest.ListingDiff(a, b) }

// checkJSON validates a command's stdout against its output schema and
// the one-document contract (clitest.CheckJSON).
func checkJSON(t *testing.T, cmd string, r result) map[string]any {
	t.Helper()
	return clitest.CheckJSON(t, cmd, clitest.Result{Code: r.code, Stdout: r.stdout, Stderr: r.stderr})
}

// logReport is the part of log --json the crash suites read.
type logReport = clitest.LogReport

// killed is the outcome of a modelgate process that may have been sent
// SIGKILL.
type killed struct {
	finished bool   // it exited by itself before the signal
	res      result // its exit code and output, when finished
}

func fromKilled(k clitest.Killed) killed { return killed{k.Finished, fromResult(k.Res)} }

// runCrashAt runs the crashpoints build with args, killing itself after
// step at.
func runCrashAt(t *testing.T, store, at string, args ...string) killed {
	t.Helper()
	k := clitest.RunCrashAt(t, store, at, args...)
	return fromKilled(k)
}
