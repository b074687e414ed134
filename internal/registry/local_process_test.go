package registry_test

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"sync"
	"testing"

	"modelgate/internal/registry"
	"modelgate/internal/registry/storetest"
)

const (
	helperStoreEnv = "MODELGATE_TEST_HELPER_STORE"
	helperIndexEnv = "MODELGATE_TEST_HELPER_INDEX"
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
