package crashsuite

import (
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"
)

// The local store on a full disk. Two real mechanisms, not a fake writer:
//
//   - tmpfs: a small tmpfs is mounted for the store (root with
//     CAP_SYS_ADMIN only; the subtest says why it skips otherwise) and a
//     filler file takes all its space but a chosen room, so a write fails
//     with ENOSPC wherever the room runs out;
//   - fsize: the command runs under RLIMIT_FSIZE (prlimit(1), util-linux),
//     so writing a file past the limit fails with EFBIG (Go ignores
//     SIGXFSZ); it works unprivileged.
//
// At each room push, approve and promote either succeed or exit non-zero
// naming the cause; a refused command leaves the store verifying and
// either byte-identical or in the release log's documented interrupted
// state; with space again, the same command completes and the log
// verifies.

// fullDisk runs modelgate commands against a store with little room.
type fullDisk struct {
	t     *testing.T
	store string
	// squeeze leaves room bytes to write (per file, for fsize) and
	// returns what gives the space back.
	squeeze func(room int64) (release func())
	// command is the program and arguments that run modelgate args with
	// room bytes left.
	command func(room int64, args []string) (string, []string)
	// cause is the text the refusal must show.
	cause string
}

// tmpfsDisk mounts a tmpfs of size bytes for the store, or skips saying
// why it cannot.
func tmpfsDisk(t *testing.T, size int64) *fullDisk {
	t.Helper()
	dir := t.TempDir()
	out, err := exec.Command("mount", "-t", "tmpfs", "-o", fmt.Sprintf("size=%d", size), "tmpfs", dir).CombinedOutput()
	if err != nil {
		t.Skipf("mount -t tmpfs needs root with CAP_SYS_ADMIN (%v: %s); the fsize subtest covers the store on a full disk", err, strings.TrimSpace(string(out)))
	}
	t.Cleanup(func() {
		if out, err := exec.Command("umount", dir).CombinedOutput(); err != nil {
			t.Errorf("umount %s: %v %s", dir, err, out)
		}
	})
	d := &fullDisk{t: t, store: filepath.Join(dir, "store"), cause: "no space left on device"}
	filler := filepath.Join(dir, "filler")
	d.squeeze = func(room int64) func() {
		t.Helper()
		f, err := os.Create(filler)
		if err != nil {
			t.Fatal(err)
		}
		defer f.Close()
		buf := make([]byte, 64<<10)
		var n int64
		for {
			k, err := f.Write(buf)
			n += int64(k)
			if errors.Is(err, syscall.ENOSPC) {
				break
			}
			if err != nil {
				t.Fatal(err)
			}
		}
		if err := f.Truncate(max(n-room, 0)); err != nil {
			t.Fatal(err)
		}
		return func() { os.Remove(filler) }
	}
	d.command = func(_ int64, args []string) (string, []string) { return clitest.Binary, args }
	return d
}

// fsizeDisk runs each command under RLIMIT_FSIZE.
func fsizeDisk(t *testing.T) *fullDisk {
	t.Helper()
	if _, err := exec.LookPath("prlimit"); err != nil {
		t.Skip("prlimit (util-linux) is not installed")
	}
	return &fullDisk{
		t: t, store: filepath.Join(t.TempDir(), "store"), cause: "file too large",
		squeeze: func(int64) func() { return func() {} },
		command: func(room int64, args []string) (string, []string) {
			return "prlimit", append([]string{fmt.Sprintf("--fsize=%d", room), clitest.Binary}, args...)
		},
	}
}

// run runs modelgate args with room bytes left.
func (d *fullDisk) run(room int64, args ...string) clitest.Result {
	d.t.Helper()
	release := d.squeeze(room)
	defer release()
	bin, argv := d.command(room, args)
	cmd := exec.Command(bin, argv...)
	cmd.Env = append(os.Environ(), "MODELGATE_STORE="+d.store)
	var so, se strings.Builder
	cmd.Stdout, cmd.Stderr = &so, &se
	err := cmd.Run()
	code := 0
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		code = ee.ExitCode()
		if ws, ok := ee.Sys().(syscall.WaitStatus); ok && ws.Signaled() {
			d.t.Fatalf("modelgate %v was killed by %v", args, ws.Signal())
		}
	} else if err != nil {
		d.t.Fatal(err)
	}
	return clitest.Result{Code: code, Stdout: so.String(), Stderr: se.String()}
}

func TestStoreOnFullDisk(t *testing.T) {
	for _, mech := range []string{"tmpfs", "fsize"} {
		t.Run(mech, func(t *testing.T) {
			var d *fullDisk
			if mech == "tmpfs" {
				d = tmpfsDisk(t, 8<<20)
			} else {
				d = fsizeDisk(t)
			}
			fullDiskReleases(t, d)
		})
	}
}

func fullDiskReleases(t *testing.T, d *fullDisk) {
	w := clitest.NewWorldAt(t, 1, d.store)
	w.Push(0, "tiny-encoder:prod")
	root := t.TempDir()
	// The room left, from none to more than any of these commands
	// writes at once (the fixture's blobs are a few KiB).
	rooms := []int64{0, 2 << 10, 8 << 10, 32 << 10, 128 << 10}
	var refused, changed, completed, interrupted int
	shown := map[string]bool{}
	var fit []string
	for i, room := range rooms {
		n := i + 1
		cand := fmt.Sprintf("tiny-encoder:v%d", n)
		steps := []struct {
			what string
			args []string
		}{
			{"push", []string{"push", clitest.BigEncoder(t, root, fmt.Sprintf("full-encoder-%d", n), uint64(n), 200+n), cand}},
			{"gate", []string{"gate", cand, "--to", "tiny-encoder:prod", "--policy", w.Policy, "--sign-key", w.Key("ci")}},
			{"approve", []string{"approve", cand, "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key("ana")}},
			{"promote", []string{"promote", cand, "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key("rita")}},
		}
		for _, s := range steps {
			what := fmt.Sprintf("%s with %d bytes of room", s.what, room)
			before := clitest.Listing(t, d.store)
			r := d.run(room, s.args...)
			if r.Code == 0 {
				fit = append(fit, what)
			} else {
				refused++
				if !shown[s.what] {
					shown[s.what] = true
					t.Logf("%s: exit %d: %s", what, r.Code, strings.TrimSpace(r.Stderr[strings.LastIndex(strings.TrimSpace(r.Stderr), "\n")+1:]))
				}
				if !strings.Contains(r.Stderr, d.cause) || !strings.Contains(r.Stderr, "free space and run the command again") {
					t.Errorf("%s: exit %d without naming the cause %q:\n%s", what, r.Code, d.cause, r.Stderr)
				}
				if r.Code == 5 {
					t.Errorf("%s: exit 5 (integrity) for a full disk:\n%s", what, r.Stderr)
				}
				clitest.MustVerify(t, d.store, what)
				if after := clitest.Listing(t, d.store); after != before {
					// Not byte-identical: only the release log's documented
					// interrupted state is allowed, which the next promote
					// completes.
					code, rep := logOf(t, d.store, "tiny-encoder:prod")
					if code != 0 && !isInterrupted(rep) {
						t.Fatalf("%s: the store changed and log exits %d: %+v\n%s", what, code, rep.Findings, clitest.ListingDiff(before, after))
					}
					changed++
					t.Logf("%s: exit %d changed the store, which verifies:\n%s", what, r.Code, clitest.ListingDiff(before, after))
					if code != 0 {
						interrupted++
					}
				}
				// With space again the same command completes.
				r = clitest.MG(t, d.store, s.args...)
				if r.Code != 0 {
					t.Fatalf("%s, run again with space: exit %d\n%s%s", what, r.Code, r.Stdout, r.Stderr)
				}
				completed++
			}
			clitest.MustVerify(t, d.store, what)
		}
		if got := w.Prod(); got == "" || !strings.HasPrefix(got, "sha256:") {
			t.Fatalf("tiny-encoder:prod after round %d: %q", n, got)
		}
		clitest.MustMG(t, d.store, "log", "tiny-encoder:prod", "--policy", w.Policy)
	}
	if refused == 0 {
		t.Fatalf("no command ran out of room: the test tested nothing")
	}
	t.Logf("fitted in the room left: %q", fit)
	t.Logf("%d commands refused for lack of room (%d changed the store, verifying, %d of them in the documented interrupted state), %d completed when run again",
		refused, changed, interrupted, completed)
}

// logOf runs log --json on target.
func logOf(t *testing.T, store, target string) (int, clitest.LogReport) {
	t.Helper()
	r := clitest.MG(t, store, "log", "--json", target)
	var rep clitest.LogReport
	if err := json.Unmarshal([]byte(r.Stdout), &rep); err != nil {
		t.Fatalf("log --json %s: exit %d, %v\n%s%s", target, r.Code, err, r.Stdout, r.Stderr)
	}
	return r.Code, rep
}

// isInterrupted: the one damage finding is the documented interrupted
// release.
func isInterrupted(rep clitest.LogReport) bool {
	var damage []string
	for _, f := range rep.Findings {
		if f.Severity == "damage" {
			damage = append(damage, f.Message)
		}
	}
	return len(damage) == 1 && strings.HasPrefix(damage[0], "interrupted: record ")
}
