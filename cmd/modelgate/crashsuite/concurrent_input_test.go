package crashsuite

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"
)

// A tensor file rewritten while push reads it, and verify run while push
// writes: inputs and neighbours that change under a command.

// crashSigns are what a Go process prints when it dies of a fault (a
// mapped file truncated under it) or a panic: never acceptable output.
var crashSigns = []string{"fatal error", "unexpected fault address", "SIGBUS", "panic:", "goroutine "}

// TestTensorFileChangesDuringPush pushes a model directory while another
// goroutine keeps rewriting its largest tensor file, on the local store
// (which streams the file once, hashing, writing and checking the same
// bytes) and on a registry and GCS (which read it into memory, hash and
// check it, then upload those bytes; they used to map the file, and a
// truncation under the mapping killed push with SIGBUS). Two ways of rewriting: in place, the same size (a torn read
// gives a file of the right shape with mixed values), and by truncating
// and writing a file of another size. Whatever the interleaving: push
// exits 0 or 2, never crashes; after exit 2 the message says the file
// changed; the store verifies; and a tag pushed with exit 0 pulls (pull
// checks every blob against its digest) to a tensor file that matches the
// spec. Which interleavings occur depends on the scheduler; the
// assertions hold for all of them.
func TestTensorFileChangesDuringPush(t *testing.T) {
	if testing.Short() {
		t.Skip("pushes several MB many times per store kind")
	}
	root := t.TempDir()
	a := clitest.BigEncoder(t, root, "changing-encoder", 1, 24000)
	b := clitest.BigEncoder(t, filepath.Join(root, "other"), "changing-encoder", 2, 24000)
	const file = "encoder.safetensors"
	bytesA, err := os.ReadFile(filepath.Join(a, file))
	if err != nil {
		t.Fatal(err)
	}
	bytesB, err := os.ReadFile(filepath.Join(b, file))
	if err != nil {
		t.Fatal(err)
	}
	if len(bytesA) != len(bytesB) || len(bytesA) < 2<<20 {
		t.Fatalf("the two tensor files are %d and %d bytes; want equal sizes over the 1 MiB push maps", len(bytesA), len(bytesB))
	}
	path := filepath.Join(a, file)
	rewrite := map[string]func(i int) error{
		"in place": func(i int) error {
			f, err := os.OpenFile(path, os.O_WRONLY, 0)
			if err != nil {
				return err
			}
			src := bytesA
			if i%2 == 0 {
				src = bytesB
			}
			_, err = f.WriteAt(src, 0)
			if cerr := f.Close(); err == nil {
				err = cerr
			}
			return err
		},
		"truncated": func(i int) error {
			if i%2 == 0 {
				return os.WriteFile(path, bytesB[:len(bytesB)/2], 0o644)
			}
			return os.WriteFile(path, bytesA, 0o644)
		},
	}
	const runs = 6
	for _, k := range clitest.EveryStore(t, "changing") {
		if k.Name == "registry-no-catalog" {
			continue // the same upload path as "registry"
		}
		t.Run(k.Name, func(t *testing.T) {
			var pushed, refused int
			for _, mode := range []string{"in place", "truncated"} {
				for i := range runs {
					if err := os.WriteFile(path, bytesA, 0o644); err != nil {
						t.Fatal(err)
					}
					tag := fmt.Sprintf("changing-encoder:%s-%d", strings.ReplaceAll(mode, " ", "-"), i)
					var stop atomic.Bool
					var wg sync.WaitGroup
					var werr error
					wg.Add(1)
					go func() {
						defer wg.Done()
						for n := 0; !stop.Load(); n++ {
							if err := rewrite[mode](n); err != nil {
								werr = err
								return
							}
						}
					}()
					r := clitest.MG(t, k.Loc, "push", a, tag)
					stop.Store(true)
					wg.Wait()
					if werr != nil {
						t.Fatal(werr)
					}
					what := fmt.Sprintf("%s, rewritten %s, run %d", k.Name, mode, i)
					for _, s := range crashSigns {
						if strings.Contains(r.Stderr, s) {
							t.Fatalf("%s: push crashed (exit %d):\n%s", what, r.Code, r.Stderr)
						}
					}
					switch r.Code {
					case 0:
						pushed++
						out := filepath.Join(t.TempDir(), "pulled")
						if p := clitest.MG(t, k.Loc, "pull", tag, out); p.Code != 0 {
							t.Fatalf("%s: pushed with exit 0, but pull exits %d:\n%s", what, p.Code, p.Stderr)
						}
						// The pulled directory is a model directory push
						// accepts: its tensor file has the spec's shapes.
						if p := clitest.MG(t, filepath.Join(t.TempDir(), "check"), "push", out, "pulled:v1"); p.Code != 0 {
							t.Fatalf("%s: the pulled model does not push again (exit %d):\n%s", what, p.Code, p.Stderr)
						}
					case 2:
						refused++
						// It names the file: as changed while pushed, or as
						// invalid (the truncated file push read).
						if !strings.Contains(r.Stderr, file) || !(strings.Contains(r.Stderr, "changed while it was pushed") || strings.Contains(r.Stderr, "invalid safetensors")) {
							t.Errorf("%s: exit 2 without naming %s as changed or invalid:\n%s", what, file, r.Stderr)
						}
					default:
						t.Fatalf("%s: push exit %d, want 0 or 2:\n%s", what, r.Code, r.Stderr)
					}
					clitest.MustVerify(t, k.Loc, what)
				}
			}
			t.Logf("%s: %d pushes stored what they read, %d refused the changing file", k.Name, pushed, refused)
		})
	}
	os.WriteFile(path, bytesA, 0o644)
}

// TestPushAndVerifyAtOnce runs verify over and over while several-MB
// models are pushed into the same store: no verify may report damage for
// a push in flight, and every push succeeds.
func TestPushAndVerifyAtOnce(t *testing.T) {
	if testing.Short() {
		t.Skip("pushes several MB while verifying")
	}
	root := t.TempDir()
	for _, k := range clitest.EveryStore(t, "pushverify") {
		if k.Name == "registry-no-catalog" {
			continue // verify there needs the repository names; "registry" covers the registry
		}
		t.Run(k.Name, func(t *testing.T) {
			clitest.MustMG(t, k.Loc, "push", clitest.BigEncoder(t, root, "verify-encoder-0-"+k.Name, 100, 24000), "verify-encoder:v0")
			var stop atomic.Bool
			var verifies atomic.Int64
			var wg sync.WaitGroup
			fails := make(chan clitest.Result, 1)
			for range 2 {
				wg.Add(1)
				go func() {
					defer wg.Done()
					for !stop.Load() {
						r := clitest.MG(t, k.Loc, "verify", "--json")
						if r.Code != 0 {
							select {
							case fails <- r:
							default:
							}
							return
						}
						verifies.Add(1)
					}
				}()
			}
			for i := 1; i <= 4; i++ {
				dir := clitest.BigEncoder(t, root, fmt.Sprintf("verify-encoder-%d-%s", i, k.Name), uint64(100+i), 24000)
				r := clitest.MG(t, k.Loc, "push", dir, fmt.Sprintf("verify-encoder:v%d", i))
				if r.Code != 0 {
					stop.Store(true)
					wg.Wait()
					t.Fatalf("push %d while verifying: exit %d\n%s", i, r.Code, r.Stderr)
				}
			}
			stop.Store(true)
			wg.Wait()
			select {
			case r := <-fails:
				t.Fatalf("verify during a push: exit %d\n%s%s", r.Code, r.Stdout, r.Stderr)
			default:
			}
			if verifies.Load() == 0 {
				t.Fatalf("no verify ran during the pushes")
			}
			clitest.MustVerify(t, k.Loc, "after the pushes")
			t.Logf("%s: %d verify runs during 4 pushes, all exit 0", k.Name, verifies.Load())
		})
	}
}
