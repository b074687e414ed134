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
	"sync"
	"syscall"
	"testing"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

const (
	helperStoreEnv = "MODELGATE_TEST_HELPER_STORE"
	helperIndexEnv = "MODELGATE_TEST_HELPER_INDEX"
	helperKillEnv  = "MODELGATE_TEST_HELPER_KILLED_STORE"
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
// and moves tags until it is killed.
func TestHelperKilledWriter(t *testing.T) {
	dir := os.Getenv(helperKillEnv)
	if dir == "" {
		t.Skip("helper process for TestLocalKilledWriter")
	}
	run, err := strconv.Atoi(os.Getenv(helperIndexEnv))
	if err != nil {
		t.Fatal(err)
	}
	l, err := registry.OpenLocal(dir)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	models := []v1.Descriptor{
		storetest.Push(t, l, killedRepo, "", storetest.NewArtifact(600, "application/vnd.modelgate.scorer.v1", nil, nil)),
		storetest.Push(t, l, killedRepo, "", storetest.NewArtifact(601, "application/vnd.modelgate.scorer.v1", nil, nil)),
	}
	for i := 0; ; i++ {
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
}

// TestLocalKilledWriter kills a writer process with SIGKILL at random
// points (fixed seed; the points depend on timing, no assertion does):
// afterwards the store has no damage, every tag resolves to a readable
// manifest and every referrer listed is readable. A kill leaves at most
// blobs, side files and temporary files that nothing names (hints).
func TestLocalKilledWriter(t *testing.T) {
	if testing.Short() {
		t.Skip("crash test skipped with -short")
	}
	dir := filepath.Join(t.TempDir(), "store")
	rng := rand.New(rand.NewPCG(7, 7))
	ctx := context.Background()
	for run := range 12 {
		cmd := exec.Command(os.Args[0], "-test.run=^TestHelperKilledWriter$", "-test.count=1")
		cmd.Env = append(os.Environ(), helperKillEnv+"="+dir, helperIndexEnv+"="+strconv.Itoa(run))
		var out bytes.Buffer
		cmd.Stdout, cmd.Stderr = &out, &out
		if err := cmd.Start(); err != nil {
			t.Fatal(err)
		}
		time.Sleep(time.Duration(50+rng.IntN(400)) * time.Millisecond)
		_ = cmd.Process.Signal(syscall.SIGKILL)
		if err := cmd.Wait(); err == nil || bytes.Contains(out.Bytes(), []byte("--- FAIL")) {
			t.Fatalf("run %d: the writer stopped before it was killed: %v\n%s", run, err, out.Bytes())
		}

		l, err := registry.OpenLocal(dir)
		if err != nil {
			t.Fatalf("run %d: %v", run, err)
		}
		fs := scrubFindings(t, l, nil)
		for _, f := range fs {
			if f.Severity != registry.SeverityHint {
				t.Errorf("run %d: %+v", run, f)
			}
		}
		tags, err := l.Tags(ctx, killedRepo)
		if err != nil && !errors.Is(err, registry.ErrNotFound) {
			t.Fatalf("run %d: Tags: %v", run, err)
		}
		for _, tag := range tags {
			d, err := l.Resolve(ctx, killedRepo, tag)
			if err != nil {
				t.Errorf("run %d: Resolve(%s): %v", run, tag, err)
				continue
			}
			if _, _, err := l.Manifest(ctx, killedRepo, d.Digest); err != nil {
				t.Errorf("run %d: tag %s points at an unreadable manifest: %v", run, tag, err)
			}
			refs, err := l.Referrers(ctx, killedRepo, d.Digest, "")
			if err != nil {
				t.Errorf("run %d: Referrers of %s: %v", run, tag, err)
			}
			for _, r := range refs {
				if _, _, err := l.Manifest(ctx, killedRepo, r.Digest); err != nil {
					t.Errorf("run %d: referrer %s of %s unreadable: %v", run, r.Digest, tag, err)
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
	t.Logf("%d manifests after 12 killed writers", len(ms))
}
