// Package clitest holds what the black-box tests of the modelgate command
// share: the binary built once per test package, a runner that returns its
// exit code and output, the tiny model fixtures, a store listing to prove a
// store did not change, and one location of every store kind.
//
// A test package calls Main from its TestMain; the tests then run the
// binary with MG and MustMG. Nothing here is part of modelgate itself.
package clitest

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"sort"
	"strings"
	"sync"
	"syscall"
	"testing"

	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/registry"
)

// Package is the import path of the command the tests build.
const Package = "github.com/modelgate/modelgate/cmd/modelgate"

// binDir holds the binaries Main builds and the blob cache of the run.
var binDir string

// Binary is the modelgate executable Main built for this test package.
var Binary string

// Main builds the modelgate binary once into a temporary directory, points
// the blob cache of every test run there (never the user's cache
// directory), calls each of setup (after the build, before the tests),
// runs the tests and exits with their status. Call it from TestMain.
func Main(m *testing.M, setup ...func()) {
	os.Exit(run(m, setup))
}

func run(m *testing.M, setup []func()) int {
	dir, err := os.MkdirTemp("", "modelgate-e2e-")
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 1
	}
	defer os.RemoveAll(dir)
	binDir = dir
	os.Setenv(registry.EnvCache, filepath.Join(dir, "cache"))
	Binary, err = build(dir, "modelgate")
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 1
	}
	for _, f := range setup {
		f()
	}
	return m.Run()
}

// build builds the command into dir under name with the build tags given.
func build(dir, name string, tags ...string) (string, error) {
	bin := filepath.Join(dir, name)
	if runtime.GOOS == "windows" {
		bin += ".exe"
	}
	args := []string{"build", "-o", bin}
	if len(tags) > 0 {
		args = append(args, "-tags", strings.Join(tags, ","))
	}
	out, err := exec.Command("go", append(args, Package)...).CombinedOutput()
	if err != nil {
		return "", fmt.Errorf("building modelgate %s: %v\n%s", strings.Join(tags, ","), err, out)
	}
	return bin, nil
}

var crashBuild struct {
	once sync.Once
	path string
	err  error
}

// CrashpointBinary builds modelgate with -tags crashpoints once per test
// package and returns its path: a build that sends itself SIGKILL after
// the release step MODELGATE_TEST_CRASH_AT names (the release binary has
// no such hook).
func CrashpointBinary(t testing.TB) string {
	t.Helper()
	crashBuild.once.Do(func() {
		if binDir == "" {
			crashBuild.err = errors.New("clitest.Main did not run (call it from TestMain)")
			return
		}
		crashBuild.path, crashBuild.err = build(binDir, "modelgate-crashpoints", "crashpoints")
	})
	if crashBuild.err != nil {
		t.Fatal(crashBuild.err)
	}
	return crashBuild.path
}

// Result is how a modelgate process ended: its exit code and output.
type Result struct {
	Code           int
	Stdout, Stderr string
}

// MG runs the built binary against store with args.
func MG(t testing.TB, store string, args ...string) Result {
	t.Helper()
	return RunEnv(t, Binary, []string{"MODELGATE_STORE=" + store}, args...)
}

// RunEnv runs the executable bin with args and the environment of the test
// plus env; a process that cannot start fails the test.
func RunEnv(t testing.TB, bin string, env []string, args ...string) Result {
	t.Helper()
	if bin == "" {
		t.Fatal("clitest.Main did not run (call it from TestMain)")
	}
	cmd := exec.Command(bin, args...)
	cmd.Env = append(os.Environ(), env...)
	var so, se bytes.Buffer
	cmd.Stdout, cmd.Stderr = &so, &se
	err := cmd.Run()
	code := 0
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		code = ee.ExitCode()
	} else if err != nil {
		t.Fatalf("running modelgate %v: %v", args, err)
	}
	return Result{code, so.String(), se.String()}
}

// MustMG is MG that fails the test unless modelgate exits 0.
func MustMG(t testing.TB, store string, args ...string) Result {
	t.Helper()
	r := MG(t, store, args...)
	if r.Code != 0 {
		t.Fatalf("modelgate %s: exit %d\nstdout: %s\nstderr: %s", strings.Join(args, " "), r.Code, r.Stdout, r.Stderr)
	}
	return r
}

// Killed is the outcome of a modelgate process that may have been killed
// with SIGKILL: Finished when it exited by itself, with its Result.
type Killed struct {
	Finished bool
	Res      Result
}

// Outcome turns what exec.Cmd.Wait returned into a Killed.
func Outcome(t testing.TB, err error, stdout, stderr string, args []string) Killed {
	t.Helper()
	var ee *exec.ExitError
	switch {
	case err == nil:
		return Killed{Finished: true, Res: Result{0, stdout, stderr}}
	case errors.As(err, &ee):
		if ws, ok := ee.Sys().(syscall.WaitStatus); ok && ws.Signaled() {
			return Killed{}
		}
		return Killed{Finished: true, Res: Result{ee.ExitCode(), stdout, stderr}}
	}
	t.Fatalf("running modelgate %v: %v", args, err)
	return Killed{}
}

// RunCrashAt runs the crashpoints build (CrashpointBinary) with args
// against store, killing itself after release step at (STEP:N).
func RunCrashAt(t testing.TB, store, at string, args ...string) Killed {
	t.Helper()
	cmd := exec.Command(CrashpointBinary(t), args...)
	cmd.Env = append(os.Environ(), "MODELGATE_STORE="+store, "MODELGATE_TEST_CRASH_AT="+at)
	var so, se bytes.Buffer
	cmd.Stdout, cmd.Stderr = &so, &se
	err := cmd.Run()
	return Outcome(t, err, so.String(), se.String(), args)
}

// Fixtures writes the tiny encoder and scorer into a fresh directory.
func Fixtures(t testing.TB) (encDir, scorerDir string) {
	t.Helper()
	dir := t.TempDir()
	if _, err := fixture.Write(dir); err != nil {
		t.Fatal(err)
	}
	return filepath.Join(dir, fixture.EncoderDir), filepath.Join(dir, fixture.ScorerDir)
}

// Listing describes every file of a directory tree (path, size, content)
// so tests can assert a store did not change.
func Listing(t testing.TB, root string) string {
	t.Helper()
	var lines []string
	err := filepath.Walk(root, func(p string, info os.FileInfo, err error) error {
		if err != nil {
			return err
		}
		rel, _ := filepath.Rel(root, p)
		if info.IsDir() {
			lines = append(lines, rel+"/")
			return nil
		}
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		lines = append(lines, fmt.Sprintf("%s %d %x", rel, len(b), b))
		return nil
	})
	if err != nil && !os.IsNotExist(err) {
		t.Fatal(err)
	}
	sort.Strings(lines)
	return strings.Join(lines, "\n")
}

// CountBlobs is the number of blobs in the local store at store.
func CountBlobs(t testing.TB, store string) int {
	t.Helper()
	es, err := os.ReadDir(filepath.Join(store, "blobs", "sha256"))
	if err != nil {
		t.Fatal(err)
	}
	return len(es)
}
