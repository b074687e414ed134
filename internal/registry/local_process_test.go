package registry_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

const (
	helperStoreEnv = "MODELGATE_TEST_HELPER_STORE"
	helperIndexEnv = "MODELGATE_TEST_HELPER_INDEX"
	helperKillEnv  = "MODELGATE_TEST_HELPER_KILLED_STORE"
	helperStepEnv  = "MODELGATE_TEST_HELPER_KILL_AT"
	processes      = 16
)

func processArtifact(i int) storetest.Artifact {
	return storetest.NewArtifact(uint64(500+i), "application/vnd.modelgate.encoder.v1", nil, nil)
}

var processShared = storetest.NewBlob(499, 256<<10)

// TestHelperProcess is not a test: TestLocalMultiProcess runs the test
// binary with this test selected and the environment set, and it pushes
// one artifact as another process would.
func TestHelperProcess(t *testing.T) {
	dir := os.Getenv(helperStoreEnv)
	if dir == "" {
		t.Skip("helper process for TestLocalMultiProcess")
	}
	i, err := strconv.Atoi(os.Getenv(helperIndexEnv))
	if err != nil {
		t.Fatal(err)
	}
	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	const repo = "podcast/episodes-played"
	ctx := context.Background()
	if err := l.PutBlob(ctx, repo, processShared.Digest, int64(len(processShared.Data)), bytes.NewReader(processShared.Data)); err != nil {
		t.Fatal(err)
	}
	storetest.Push(t, l, repo, fmt.Sprintf("proc-%02d", i), processArtifact(i))
}

// TestLocalMultiProcess runs 16 processes that each open the same (not yet
// created) store and push a blob shared by all, an artifact and a tag.
func TestLocalMultiProcess(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "store")
	var wg sync.WaitGroup
	errs := make([]error, processes)
	outs := make([][]byte, processes)
	for i := range processes {
		wg.Add(1)
		go func() {
			defer wg.Done()
			cmd := exec.Command(os.Args[0], "-test.run=^TestHelperProcess$", "-test.count=1")
			cmd.Env = append(os.Environ(), helperStoreEnv+"="+dir, helperIndexEnv+"="+strconv.Itoa(i))
			outs[i], errs[i] = cmd.CombinedOutput()
		}()
	}
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			t.Errorf("process %d: %v\n%s", i, err, outs[i])
		}
	}

	ctx := context.Background()
	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	const repo = "podcast/episodes-played"
	tags, err := l.Tags(ctx, repo)
	if err != nil || len(tags) != processes {
		t.Fatalf("Tags = %q, %v; want %d", tags, err, processes)
	}
	var arts []storetest.Artifact
	for i := range processes {
		a := processArtifact(i)
		arts = append(arts, a)
		d, err := l.Resolve(ctx, repo, fmt.Sprintf("proc-%02d", i))
		if err != nil || d.Digest != a.Manifest.Digest {
			t.Errorf("proc-%02d resolves to %v, %v; want %s", i, d.Digest, err, a.Manifest.Digest)
		}
	}
	idx := readIndexFile(t, dir) // fails the test on torn or invalid JSON
	if len(idx.Manifests) != processes {
		t.Errorf("index.json has %d entries, want %d (one tag entry per process)", len(idx.Manifests), processes)
	}
	if side := readSideFiles(t, dir); len(side) != processes {
		t.Errorf("%d side files, want %d (one per manifest)", len(side), processes)
	}
	referenced := referencedBy(arts...)
	referenced[processShared.Digest] = true
	if fs := scrubFindings(t, l, referenced); len(fs) != 0 {
		t.Errorf("Scrub after concurrent processes: %+v", fs)
	}
}

const killedRepo = "podcast/promo-scorer"

// TestHelperKilledWriter is not a test: TestLocalKilledWriter runs the
// test binary with this test selected; it writes release-style records
// and moves tags, and sends itself SIGKILL after the step the test names
// (STEP:N, the N-th time the store passes STEP; registry.SetStepHook).
func TestHelperKilledWriter(t *testing.T) {
	dir := os.Getenv(helperKillEnv)
	if dir == "" {
		t.Skip("helper process for TestLocalKilledWriter")
	}
	run, err := strconv.Atoi(os.Getenv(helperIndexEnv))
	if err != nil {
		t.Fatal(err)
	}
	at, nth, _ := strings.Cut(os.Getenv(helperStepEnv), ":")
	want, err := strconv.Atoi(nth)
	if err != nil {
		t.Fatalf("%s=%q: want STEP:N", helperStepEnv, os.Getenv(helperStepEnv))
	}
	seen := 0
	registry.SetStepHook(func(step string) {
		if step != at {
			return
		}
		if seen++; seen == want {
			_ = syscall.Kill(os.Getpid(), syscall.SIGKILL)
			select {}
		}
	})
	defer registry.SetStepHook(nil)
	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	models := []v1.Descriptor{
		storetest.Push(t, l, killedRepo, "", storetest.NewArtifact(600, "application/vnd.modelgate.scorer.v1", nil, nil)),
		storetest.Push(t, l, killedRepo, "", storetest.NewArtifact(601, "application/vnd.modelgate.scorer.v1", nil, nil)),
	}
	// Every step comes round many times in each pass; a step that never
	// comes fails here rather than hanging the test.
	for i := range 1000 {
		m := models[i%2]
		subj := m
		subj.ArtifactType = ""
		rec := storetest.NewArtifact(uint64(1000*run+i), "application/vnd.modelgate.release.v1", &subj, nil)
		d := storetest.Push(t, l, killedRepo, "", rec)
		if err := storetest.ForceTag(ctx, l, killedRepo, "prod", m); err != nil {
			t.Fatal(err)
		}
		if err := storetest.ForceTag(ctx, l, killedRepo, "release-prod", d); err != nil {
			t.Fatal(err)
		}
	}
	t.Fatalf("step %s came %d times in 1000 passes, never the %d-th", at, seen, want)
}

// killedRuns is the number of writers TestLocalKilledWriter kills: each
// kind of step twice.
var killedRuns = 2 * len(registry.WriteSteps)

// TestLocalKilledWriter kills a writer process with SIGKILL after each
// kind of step of a local store write (a temporary file written, synced,
// renamed, its folder synced; blobs and small files), twice each, at the
// N-th time the step comes (N from a fixed seed, so the same points every
// run): afterwards the store has no damage, every tag resolves to a
// readable manifest and every referrer listed is readable. A kill leaves
// at most blobs, side files and temporary files that nothing names
// (hints).
func TestLocalKilledWriter(t *testing.T) {
	if testing.Short() {
		t.Skip("crash test skipped with -short")
	}
	dir := filepath.Join(t.TempDir(), "store")
	rng := rand.New(rand.NewPCG(7, 7))
	ctx := context.Background()
	for run := range killedRuns {
		at := fmt.Sprintf("%s:%d", registry.WriteSteps[run%len(registry.WriteSteps)], 1+rng.IntN(40))
		cmd := exec.Command(os.Args[0], "-test.run=^TestHelperKilledWriter$", "-test.count=1")
		cmd.Env = append(os.Environ(), helperKillEnv+"="+dir, helperIndexEnv+"="+strconv.Itoa(run), helperStepEnv+"="+at)
		var out bytes.Buffer
		cmd.Stdout, cmd.Stderr = &out, &out
		err := cmd.Run()
		var ee *exec.ExitError
		if !errors.As(err, &ee) || !ee.Sys().(syscall.WaitStatus).Signaled() {
			t.Fatalf("run %d (kill after %s): the writer was not killed: %v\n%s", run, at, err, out.Bytes())
		}

		l, err := registry.OpenLocal(dir)
		if err != nil {
			t.Fatalf("run %d (after %s): %v", run, at, err)
		}
		fs := scrubFindings(t, l, nil)
		for _, f := range fs {
			if f.Severity != registry.SeverityHint {
				t.Errorf("run %d (after %s): %+v", run, at, f)
			}
		}
		tags, err := l.Tags(ctx, killedRepo)
		if err != nil && !errors.Is(err, registry.ErrNotFound) {
			t.Fatalf("run %d (after %s): Tags: %v", run, at, err)
		}
		for _, tag := range tags {
			d, err := l.Resolve(ctx, killedRepo, tag)
			if err != nil {
				t.Errorf("run %d (after %s): Resolve(%s): %v", run, at, tag, err)
				continue
			}
			if _, _, err := l.Manifest(ctx, killedRepo, d.Digest); err != nil {
				t.Errorf("run %d (after %s): tag %s points at an unreadable manifest: %v", run, at, tag, err)
			}
			refs, err := l.Referrers(ctx, killedRepo, d.Digest, "")
			if err != nil {
				t.Errorf("run %d (after %s): Referrers of %s: %v", run, at, tag, err)
			}
			for _, r := range refs {
				if _, _, err := l.Manifest(ctx, killedRepo, r.Digest); err != nil {
					t.Errorf("run %d (after %s): referrer %s of %s unreadable: %v", run, at, r.Digest, tag, err)
				}
			}
		}
		if t.Failed() {
			return
		}
	}
	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	ms, err := l.Manifests(ctx, killedRepo)
	if err != nil || len(ms) < 3 {
		t.Fatalf("the writers recorded %d manifests (%v): the kills came before any record was written", len(ms), err)
	}
	t.Logf("%d manifests after %d killed writers", len(ms), killedRuns)
}
