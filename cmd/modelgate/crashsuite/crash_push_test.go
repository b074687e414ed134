package crashsuite

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/clitest"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// TestCrashDuringPush kills `push` with SIGKILL at many points; afterwards
// verify passes and the tag points at its old or its new target.
func TestCrashDuringPush(t *testing.T) {
	if testing.Short() {
		t.Skip("crash suite skipped with -short")
	}
	store := filepath.Join(t.TempDir(), "store")
	root := t.TempDir()
	const runs = 24
	dirs := make([]string, 3)
	for i := range dirs {
		dirs[i] = clitest.BigEncoder(t, root, fmt.Sprintf("crash-encoder-%d", i), uint64(i+1), 24000)
	}
	old := strings.TrimSpace(clitest.MustMG(t, store, "push", dirs[0], "crash-encoder:prod").Stdout)
	// Measure one full push to spread the kill points over it (the timing
	// only picks kill points; no assertion depends on it).
	start := time.Now()
	probe := filepath.Join(t.TempDir(), "probe-store")
	clitest.MustMG(t, probe, "push", dirs[1], "crash-encoder:prod")
	full := time.Since(start)
	rng := rand.New(rand.NewPCG(42, 42))
	targets := map[string]bool{old: true}
	for i := 0; i < runs; i++ {
		dir := dirs[1+i%2]
		cmd := exec.Command(clitest.Binary, "push", dir, "crash-encoder:prod")
		cmd.Env = append(os.Environ(), "MODELGATE_STORE="+store)
		var so bytes.Buffer
		cmd.Stdout = &so
		if err := cmd.Start(); err != nil {
			t.Fatal(err)
		}
		delay := time.Duration(rng.Int64N(int64(full) + 1))
		time.Sleep(delay)
		_ = cmd.Process.Signal(syscall.SIGKILL)
		err := cmd.Wait()
		if err == nil {
			targets[strings.TrimSpace(so.String())] = true
		}
		r := clitest.MG(t, store, "verify", "--json")
		if r.Code != 0 {
			t.Fatalf("run %d (kill after %v): verify exit %d\n%s%s", i, delay, r.Code, r.Stdout, r.Stderr)
		}
		var ls []clitest.LsRow
		if err := json.Unmarshal([]byte(clitest.MustMG(t, store, "ls", "--json", "crash-encoder").Stdout), &ls); err != nil {
			t.Fatal(err)
		}
		if len(ls) != 1 {
			t.Fatalf("run %d: %d tags, want 1", i, len(ls))
		}
		cur := ls[0].Digest
		d, err := modeldir.Read(dir)
		if err != nil {
			t.Fatal(err)
		}
		_, h, err := artifact.ModelManifest(d)
		if err != nil {
			t.Fatal(err)
		}
		newDigest := h.String()
		if !targets[cur] && cur != newDigest {
			t.Fatalf("run %d: tag points at %s: neither an earlier target nor the new one %s", i, cur, newDigest)
		}
		targets[cur] = true
	}
}
