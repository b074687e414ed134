package crashsuite

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/modelgate/modelgate/internal/clitest"
)

// The crash suite kills modelgate with SIGKILL part way through copy,
// promote and rollback on the local store (push: TestCrashDuringPush) and
// checks what must hold whatever the kill point: verify passes (hints about
// unreferenced blobs allowed), every tag points at its old or its new
// target, and the release log either verifies or reports exactly the
// documented interrupted state (tag moved, head pointer not advanced),
// which the next promote or rollback completes. A seeded RNG picks the kill
// points, spread over the measured duration of an uninterrupted run; the
// timing only decides where the kills land, no assertion depends on it.

// runKilled starts modelgate with args against store and sends it SIGKILL
// after delay, unless it has exited by then.
func runKilled(t *testing.T, store string, delay time.Duration, args ...string) clitest.Killed {
	t.Helper()
	cmd := exec.Command(clitest.Binary, args...)
	cmd.Env = append(os.Environ(), "MODELGATE_STORE="+store)
	var so, se bytes.Buffer
	cmd.Stdout, cmd.Stderr = &so, &se
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	timer := time.AfterFunc(delay, func() { _ = cmd.Process.Signal(syscall.SIGKILL) })
	err := cmd.Wait()
	timer.Stop()
	return clitest.Outcome(t, err, so.String(), se.String(), args)
}

// timedMG runs modelgate to completion (exit 0 required) and returns how
// long it took: the span the kill points are spread over.
func timedMG(t *testing.T, store string, args ...string) (clitest.Result, time.Duration) {
	t.Helper()
	start := time.Now()
	r := clitest.MustMG(t, store, args...)
	return r, time.Since(start)
}

// killPoints picks n delays spread over [from, to): one at a random point
// of each of n equal strata, in a random order.
func killPoints(rng *rand.Rand, from, to time.Duration, n int) []time.Duration {
	out := make([]time.Duration, n)
	for i := range out {
		out[i] = from + time.Duration((float64(i)+rng.Float64())/float64(n)*float64(to-from))
	}
	rng.Shuffle(n, func(i, j int) { out[i], out[j] = out[j], out[i] })
	return out
}

// releaseKillPoints spreads half of n kill points over a whole release
// (full) and half over its last 40%, where it writes the record and moves
// the tag and the head pointer: the rest of the run is reading and
// checking, and the window between the two moves is a few milliseconds.
func releaseKillPoints(rng *rand.Rand, full time.Duration, n int) []time.Duration {
	out := append(killPoints(rng, 0, full, n/2), killPoints(rng, full*3/5, full, n-n/2)...)
	rng.Shuffle(n, func(i, j int) { out[i], out[j] = out[j], out[i] })
	return out
}

// checkTags requires every tag of after to equal before, except moving,
// which may hold its value in before or any value in allowed; headMoves
// names a tag that may change freely (a release log's head pointer, checked
// by log). No tag may disappear.
func checkTags(t *testing.T, what string, before, after map[string]string, moving string, allowed []string, headMoves string) {
	t.Helper()
	for k := range before {
		if _, ok := after[k]; !ok {
			t.Fatalf("%s: tag %s disappeared", what, k)
		}
	}
	for k, v := range after {
		switch {
		case k == headMoves:
		case k == moving:
			if v != before[k] && !slices.Contains(allowed, v) {
				t.Fatalf("%s: %s points at %s: neither its old target %q nor a new one %v", what, k, v, before[k], allowed)
			}
		case v != before[k]:
			t.Fatalf("%s: tag %s moved from %q to %s", what, k, before[k], v)
		}
	}
}

// crashTally counts where the kills landed, for the test log.
type crashTally struct{ finished, unchanged, moved, interrupted int }

func (c crashTally) String() string {
	return fmt.Sprintf("%d finished before the kill, %d killed before the tag moved, %d after it, %d in the interrupted state",
		c.finished, c.unchanged, c.moved, c.interrupted)
}

// TestCrashDuringCopy kills `copy` (local store → local store) of
// several-MB models at 12 points; the destination stays verifiable, its
// tag points at its old or its new target, and each copy run again
// completes (resuming over what the killed run left).
func TestCrashDuringCopy(t *testing.T) {
	if testing.Short() {
		t.Skip("crash suite skipped with -short")
	}
	const runs = 12
	root := t.TempDir()
	dst := filepath.Join(root, "dst")
	encDir, _ := clitest.Fixtures(t)
	clitest.MustMG(t, dst, "push", clitest.BigEncoder(t, root, "copy-encoder-old", 30, 24000), "crash-encoder:prod")
	clitest.MustMG(t, dst, "push", encDir, "tiny-encoder:v1")
	// One source store per run, each with a model the destination lacks,
	// so that every run has several MB to copy; two more to time a copy.
	type source struct{ store, digest string }
	srcs := make([]source, runs+2)
	for i := range srcs {
		store := filepath.Join(root, fmt.Sprintf("src-%d", i))
		dir := clitest.BigEncoder(t, root, fmt.Sprintf("copy-encoder-%d", i), uint64(40+i), 24000)
		srcs[i] = source{store, strings.TrimSpace(clitest.MustMG(t, store, "push", dir, "crash-encoder:prod").Stdout)}
	}
	var full time.Duration
	for i, s := range srcs[runs:] {
		_, d := timedMG(t, s.store, "copy", "crash-encoder:prod", "--dest", filepath.Join(root, fmt.Sprintf("probe-%d", i)))
		full = max(full, d)
	}
	delays := killPoints(rand.New(rand.NewPCG(7, 1)), 0, full, runs)
	var tally crashTally
	var resume []source
	for i, src := range srcs[:runs] {
		before := clitest.StoreTags(t, dst)
		what := fmt.Sprintf("copy run %d (kill after %v of %v)", i, delays[i], full)
		k := runKilled(t, src.store, delays[i], "copy", "crash-encoder:prod", "--dest", dst)
		if k.Finished && k.Res.Code != 0 {
			t.Fatalf("%s: exit %d: %s", what, k.Res.Code, k.Res.Stderr)
		}
		clitest.MustVerify(t, dst, what)
		after := clitest.StoreTags(t, dst)
		checkTags(t, what, before, after, "crash-encoder:prod", []string{src.digest}, "")
		switch {
		case k.Finished:
			tally.finished++
			if after["crash-encoder:prod"] != src.digest {
				t.Fatalf("%s: the copy finished but the tag points at %s, not %s", what, after["crash-encoder:prod"], src.digest)
			}
		case after["crash-encoder:prod"] == before["crash-encoder:prod"]:
			tally.unchanged++
			resume = append(resume, src)
		default:
			tally.moved++
		}
	}
	t.Logf("copy: %d kill points over %v: %v", runs, full, tally)
	// Run again, each interrupted copy completes: the tag, and the same
	// model bytes as in its source.
	for _, src := range resume {
		clitest.MustMG(t, src.store, "copy", "crash-encoder:prod", "--dest", dst)
		clitest.MustVerify(t, dst, "copy run again")
		if got := clitest.StoreTags(t, dst)["crash-encoder:prod"]; got != src.digest {
			t.Fatalf("copy run again: the tag points at %s, want %s", got, src.digest)
		}
		a, b := filepath.Join(t.TempDir(), "a"), filepath.Join(t.TempDir(), "b")
		clitest.MustMG(t, src.store, "pull", "crash-encoder:prod", a)
		clitest.MustMG(t, dst, "pull", "crash-encoder:prod", b)
		if clitest.Listing(t, a) != clitest.Listing(t, b) {
			t.Fatalf("the model pulled from the destination differs from its source's")
		}
	}
}

// releaseCrash checks the state after one promote or rollback that was
// killed (or finished first), from the tags before it, the target it
// moves to, and whether an interrupted release was pending before it.
type releaseCrash struct {
	t       *testing.T
	w       *clitest.World
	pending bool   // the log reported the interrupted state after the last run
	record  string // the record of that interrupted release
	tally   crashTally
}

const (
	crashTarget = "tiny-encoder:prod"
	crashHead   = "tiny-encoder:release-prod"
)

// logState runs log --json on the target and returns its exit code and
// report.
func (c *releaseCrash) logState() (int, clitest.LogReport) {
	c.t.Helper()
	r := clitest.MG(c.t, c.w.Store, "log", "--json", crashTarget)
	var rep clitest.LogReport
	if err := json.Unmarshal([]byte(r.Stdout), &rep); err != nil {
		c.t.Fatalf("log --json: exit %d, %v\n%s%s", r.Code, err, r.Stdout, r.Stderr)
	}
	return r.Code, rep
}

func (c *releaseCrash) check(what string, before map[string]string, newTarget string, k clitest.Killed) {
	t := c.t
	t.Helper()
	if k.Finished {
		if k.Res.Code != 0 {
			t.Fatalf("%s: exit %d: %s%s", what, k.Res.Code, k.Res.Stdout, k.Res.Stderr)
		}
		if c.pending && !strings.Contains(k.Res.Stdout, "completed an interrupted release first") {
			t.Fatalf("%s: finished over an interrupted release without completing it:\n%s", what, k.Res.Stdout)
		}
	}
	clitest.MustVerify(t, c.w.Store, what)
	after := clitest.StoreTags(t, c.w.Store)
	checkTags(t, what, before, after, crashTarget, []string{newTarget}, crashHead)
	cur := after[crashTarget]
	code, rep := c.logState()
	switch code {
	case 0:
		if rep.Current != cur || len(rep.Entries) == 0 || rep.Entries[0].Record.To != cur || rep.Head != rep.Entries[0].Digest || after[crashHead] != rep.Head {
			t.Fatalf("%s: log verifies but disagrees with the store: tag %s, head tag %s, report %+v", what, cur, after[crashHead], rep)
		}
		c.pending, c.record = false, ""
	case 5:
		// The one documented state: a record moved the tag, the head
		// pointer still names the record before it. Either this run got
		// that far (its tag moved; the head is where it was, or at the
		// interrupted record it completed first), or it changed nothing
		// visible and an earlier run's interrupted release is still there.
		var damage []string
		for _, f := range rep.Findings {
			if f.Severity == "damage" {
				damage = append(damage, f.Message)
			}
		}
		record := ""
		if len(damage) == 1 && strings.HasPrefix(damage[0], "interrupted: record ") {
			record, _, _ = strings.Cut(strings.TrimPrefix(damage[0], "interrupted: record "), " ")
		}
		head := after[crashHead]
		movedHere := cur == newTarget && (head == before[crashHead] || (c.pending && head == c.record))
		leftAsItWas := c.pending && cur == before[crashTarget] && head == before[crashHead] && record == c.record
		if k.Finished || record == "" || !(movedHere || leftAsItWas) {
			t.Fatalf("%s: log exit 5 with findings %q; tag %s → %s (new %s), head %s → %s, pending %v %s",
				what, damage, before[crashTarget], cur, newTarget, before[crashHead], head, c.pending, c.record)
		}
		if record != c.record {
			c.tally.interrupted++
		}
		c.pending, c.record = true, record
	default:
		t.Fatalf("%s: log exit %d: %+v", what, code, rep.Findings)
	}
	switch {
	case k.Finished:
		c.tally.finished++
		if cur != newTarget {
			t.Fatalf("%s: finished but the tag points at %s, not %s", what, cur, newTarget)
		}
	case cur == before[crashTarget]:
		c.tally.unchanged++
	default:
		c.tally.moved++
	}
}

// finish runs one uninterrupted rollback: it completes any interrupted
// release, and the log verifies with every record signed by a key the
// policy lists.
func (c *releaseCrash) finish() {
	c.t.Helper()
	// A promote of a fresh candidate completes any interrupted release and,
	// whatever state the kill points left, gives the closing rollback an
	// earlier release to return to.
	c.w.Push(99, "")
	c.w.Gate("tiny-encoder:v99")
	r := clitest.MustMG(c.t, c.w.Store, "promote", "tiny-encoder:v99", "--to", crashTarget, "--policy", c.w.Policy, "--key", c.w.Key("rita"))
	if c.pending && !strings.Contains(r.Stdout, "completed an interrupted release first") {
		c.t.Fatalf("the promote after an interrupted release did not complete it:\n%s", r.Stdout)
	}
	clitest.MustMG(c.t, c.w.Store, "rollback", crashTarget, "--reason", "after the crash suite", "--key", c.w.Key("rita"))
	clitest.MustMG(c.t, c.w.Store, "log", crashTarget, "--policy", c.w.Policy)
	clitest.MustVerify(c.t, c.w.Store, "after the crash suite")
}

// TestCrashDuringPromote kills `promote` at 20 points, each time with a
// new candidate gated against whatever the tag points at then.
func TestCrashDuringPromote(t *testing.T) {
	if testing.Short() {
		t.Skip("crash suite skipped with -short")
	}
	crashPromote(t, clitest.NewWorld(t, 0), 20)
}

// TestCrashDuringReleaseOnDockerRegistry: the timed kills of promote and
// rollback on docker-registry, when MODELGATE_TEST_REGISTRY names one (CI
// starts it with .ci/services.sh); skipped without it. Six kill points
// each, not the local store's twenty: every step of a release is killed
// exactly on docker-registry already (TestCrashDuringUnitRelease), and
// the twenty timed points run on the local store; these six check that
// kills at arbitrary instants of a registry's HTTP exchanges leave the
// same states. A docker-registry run of twenty took most of the package's
// CI time.
func TestCrashDuringReleaseOnDockerRegistry(t *testing.T) {
	if testing.Short() {
		t.Skip("crash suite skipped with -short")
	}
	for _, k := range clitest.EveryStore(t, "timedcrash") {
		if k.Name != "docker-registry" {
			continue
		}
		t.Run("promote", func(t *testing.T) { crashPromote(t, clitest.NewWorldAt(t, 0, k.Loc+"-promote"), registryRuns) })
		t.Run("rollback", func(t *testing.T) { crashRollback(t, clitest.NewWorldAt(t, 0, k.Loc+"-rollback"), registryRuns) })
		return
	}
	t.Skip("MODELGATE_TEST_REGISTRY is not set (.ci/services.sh starts docker-registry and sets it)")
}

// registryRuns is the number of timed kills of promote and of rollback
// on docker-registry.
const registryRuns = 6

// crashPromote kills promote at runs points in the world w.
func crashPromote(t *testing.T, w *clitest.World, runs int) {
	w.Push(0, crashTarget)
	var full time.Duration // the longer of two uninterrupted promotes
	for n := 1; n <= 2; n++ {
		w.Push(n, "")
		w.Gate(fmt.Sprintf("tiny-encoder:v%d", n))
		_, d := timedMG(t, w.Store, "promote", fmt.Sprintf("tiny-encoder:v%d", n), "--to", crashTarget, "--policy", w.Policy, "--key", w.Key("rita"))
		full = max(full, d)
	}
	c := &releaseCrash{t: t, w: w}
	delays := releaseKillPoints(rand.New(rand.NewPCG(7, 2)), full, runs)
	for i := range runs {
		n := i + 3
		cand := w.Push(n, "")
		w.Gate(fmt.Sprintf("tiny-encoder:v%d", n))
		before := clitest.StoreTags(t, w.Store)
		delay := delays[i]
		what := fmt.Sprintf("promote run %d (kill after %v of %v)", i, delay, full)
		k := runKilled(t, w.Store, delay, "promote", fmt.Sprintf("tiny-encoder:v%d", n), "--to", crashTarget,
			"--policy", w.Policy, "--key", w.Key("rita"), "--reason", what)
		c.check(what, before, cand, k)
	}
	t.Logf("promote: %d kill points over %v: %v", runs, full, c.tally)
	c.finish()
}

// TestCrashDuringRollback kills `rollback` at 20 points over a log of
// four releases: two of three runs jump with --to to another released
// model, every third undoes the newest record.
func TestCrashDuringRollback(t *testing.T) {
	if testing.Short() {
		t.Skip("crash suite skipped with -short")
	}
	crashRollback(t, clitest.NewWorld(t, 0), 20)
}

// crashRollback kills rollback at runs points in the world w.
func crashRollback(t *testing.T, w *clitest.World, runs int) {
	released := []string{w.Push(0, crashTarget)}
	for i := 1; i <= 3; i++ {
		released = append(released, w.Push(i, ""))
		w.Gate(fmt.Sprintf("tiny-encoder:v%d", i))
		clitest.MustMG(t, w.Store, "promote", fmt.Sprintf("tiny-encoder:v%d", i), "--to", crashTarget, "--policy", w.Policy, "--key", w.Key("rita"))
	}
	var full time.Duration // the longer of two uninterrupted rollbacks
	for range 2 {
		_, d := timedMG(t, w.Store, "rollback", crashTarget, "--reason", "timing", "--key", w.Key("rita"))
		full = max(full, d)
	}
	c := &releaseCrash{t: t, w: w}
	rng := rand.New(rand.NewPCG(7, 3))
	delays := releaseKillPoints(rng, full, runs)
	for i := range runs {
		before := clitest.StoreTags(t, w.Store)
		cur := before[crashTarget]
		args := []string{"rollback", crashTarget, "--key", w.Key("rita")}
		var to string
		undo := i%3 == 2
		if undo {
			// Undo the newest record: where to, the dry run says. Where
			// earlier kills left the tag at its first release, there is
			// nothing earlier (exit 2, said so): roll back by --to instead.
			var dry struct{ To string }
			r := clitest.MG(t, w.Store, "rollback", crashTarget, "--reason", "dry", "--dry-run", "--json")
			switch {
			case r.Code == 2 && strings.Contains(r.Stdout, "nothing earlier to roll back to"):
				undo = false
			case r.Code != 0 || json.Unmarshal([]byte(r.Stdout), &dry) != nil || dry.To == "":
				t.Fatalf("rollback --dry-run --json: exit %d, %q %q", r.Code, r.Stdout, r.Stderr)
			default:
				to = dry.To
			}
		}
		if !undo {
			others := slices.DeleteFunc(slices.Clone(released), func(d string) bool { return d == cur })
			to = others[rng.IntN(len(others))]
			args = append(args, "--to", to)
		}
		delay := delays[i]
		what := fmt.Sprintf("rollback run %d (kill after %v of %v)", i, delay, full)
		k := runKilled(t, w.Store, delay, append(args, "--reason", what)...)
		c.check(what, before, to, k)
	}
	t.Logf("rollback: %d kill points over %v: %v", runs, full, c.tally)
	c.finish()
}

// TestInterruptedPush sends SIGTERM, then SIGINT, to a push that waits for
// the store's lock (held here, so it can never finish): each exits with
// the signal's code (143, 130), leaves no temporary file in the store, and
// moves no tag. A push blocked in the wait used to ignore both signals.
func TestInterruptedPush(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, _ := clitest.Fixtures(t)
	clitest.MustMG(t, store, "push", encDir, "tiny-encoder:v1")
	lock, err := os.OpenFile(filepath.Join(store, ".modelgate", "lock"), os.O_RDWR, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer lock.Close()
	if err := syscall.Flock(int(lock.Fd()), syscall.LOCK_EX); err != nil {
		t.Fatal(err)
	}
	dir := clitest.BigEncoder(t, t.TempDir(), "interrupted-encoder", 5, 24000)
	for _, c := range []struct {
		sig  syscall.Signal
		code int
	}{{syscall.SIGTERM, 143}, {syscall.SIGINT, 130}} {
		before := clitest.StoreTags(t, store)
		cmd := exec.Command(clitest.Binary, "push", "--json", dir, "tiny-encoder:v2")
		cmd.Env = append(os.Environ(), "MODELGATE_STORE="+store)
		stderr, err := cmd.StderrPipe()
		if err != nil {
			t.Fatal(err)
		}
		if err := cmd.Start(); err != nil {
			t.Fatal(err)
		}
		// The first progress event says the signal handlers are in place
		// and the push is under way.
		sc := bufio.NewScanner(stderr)
		var rest strings.Builder
		for sc.Scan() {
			if strings.Contains(sc.Text(), `"event":"progress"`) {
				break
			}
			rest.WriteString(sc.Text() + "\n")
		}
		if err := cmd.Process.Signal(c.sig); err != nil {
			t.Fatal(err)
		}
		for sc.Scan() {
			rest.WriteString(sc.Text() + "\n")
		}
		err = cmd.Wait()
		var ee *exec.ExitError
		if !errors.As(err, &ee) || ee.ExitCode() != c.code {
			t.Fatalf("push sent %v: %v, want exit %d\n%s", c.sig, err, c.code, rest.String())
		}
		if !strings.Contains(rest.String(), "interrupted by") {
			t.Errorf("push sent %v does not say it was interrupted:\n%s", c.sig, rest.String())
		}
		tmp, err := os.ReadDir(filepath.Join(store, ".modelgate", "tmp"))
		if err != nil || len(tmp) != 0 {
			t.Errorf("push sent %v left %d temporary files (%v)", c.sig, len(tmp), err)
		}
		syscall.Flock(int(lock.Fd()), syscall.LOCK_UN)
		if after := clitest.StoreTags(t, store); fmt.Sprint(after) != fmt.Sprint(before) {
			t.Errorf("push sent %v moved tags: %v → %v", c.sig, before, after)
		}
		clitest.MustVerify(t, store, fmt.Sprintf("after a push sent %v", c.sig))
		if err := syscall.Flock(int(lock.Fd()), syscall.LOCK_EX); err != nil {
			t.Fatal(err)
		}
	}
}
