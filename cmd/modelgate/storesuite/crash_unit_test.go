package storesuite

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"

	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// The release of several tags at once (promote --with) is killed with
// SIGKILL after each of its steps — each record copy written, each release
// log head claimed, each tag moved, each copy marked committed — on the
// local store and on the GCS emulator. The kills are exact, not timed: a
// build of modelgate with -tags crashpoints sends itself SIGKILL after the
// step MODELGATE_TEST_CRASH_AT names (release.EnvCrashAt; the release
// binary has no such hook). After each kill: verify passes, each tag points
// at its old or its new model, each log verifies or shows the documented
// interrupted state, a mismatched encoder/scorer pair is always explained
// by such an interrupted record, and the next promote or rollback completes
// the release.

// unitSteps are the crash points of a release of two tags, in order.
var unitSteps = []string{"record:1", "record:2", "claim:1", "claim:2", "move:1", "move:2", "mark:1", "mark:2"}

const (
	unitEnc    = "tiny-encoder:prod"
	unitScorer = "tiny-scorer:prod"
)

// unitWorld is a clitest.World with a scorer tag tied to tiny-encoder:prod,
// both with a release log.
type unitWorld struct {
	*clitest.World
	spolicy string
	n       int
}

func newUnitWorld(t *testing.T, store string) *unitWorld {
	t.Helper()
	u := &unitWorld{World: clitest.NewWorldAt(t, 0, store)}
	u.spolicy = filepath.Join(u.Dir, "scorer.yaml")
	text := `schemaVersion: 1
name: tiny-scorer-release
rules:
  - target: tiny-scorer:prod
    kind: scorer
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
      freeze: {encoderTag: "tiny-encoder:prod"}
    approvals:
      required: 0
      approvers:
        - {name: rita, keyFile: rita.pub.pem}
      reportSigners:
        - {name: ci, keyFile: ci.pub.pem}
`
	if err := os.WriteFile(u.spolicy, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	// First releases: the encoder, then a scorer of it.
	enc := u.Push(0, "")
	u.Gate("tiny-encoder:v0")
	clitest.MustMG(t, store, "promote", "tiny-encoder:v0", "--to", unitEnc, "--policy", u.Policy, "--key", u.Key("rita"))
	u.pushScorer(0, enc)
	clitest.MustMG(t, store, "gate", "tiny-scorer:s0", "--to", unitScorer, "--policy", u.spolicy, "--sign-key", u.Key("ci"))
	clitest.MustMG(t, store, "promote", "tiny-scorer:s0", "--to", unitScorer, "--policy", u.spolicy, "--key", u.Key("rita"))
	return u
}

// pushScorer pushes a tiny scorer of encoder digest enc as tiny-scorer:s<i>.
func (u *unitWorld) pushScorer(i int, enc string) string {
	u.T.Helper()
	m := fixture.ScorerModel(fixture.EncoderModel(), enc)
	m.Spec.Name = fmt.Sprintf("tiny-promo-scorer-%02d", i)
	m.Spec.Encoder.Name = fmt.Sprintf("tiny-encoder:v%d", i)
	dir := filepath.Join(u.Dir, m.Spec.Name)
	if err := modeldir.Write(dir, m); err != nil {
		u.T.Fatal(err)
	}
	return strings.TrimSpace(clitest.MustMG(u.T, u.Store, "push", dir, fmt.Sprintf("tiny-scorer:s%d", i)).Stdout)
}

// candidates pushes and gates a new encoder and a scorer of it, each
// against what its tag points at now (the scorer in the world after the
// release), and returns their digests and the promote that releases both.
func (u *unitWorld) candidates() (enc, sc string, promote []string) {
	u.T.Helper()
	u.n++
	n := u.n
	enc = u.Push(n, "")
	sc = u.pushScorer(n, enc)
	ev, sv := fmt.Sprintf("tiny-encoder:v%d", n), fmt.Sprintf("tiny-scorer:s%d", n)
	u.Gate(ev)
	clitest.MustMG(u.T, u.Store, "gate", sv, "--to", unitScorer, "--policy", u.spolicy, "--sign-key", u.Key("ci"), "--with", ev+"="+unitEnc)
	return enc, sc, []string{"promote", ev, "--to", unitEnc, "--with", sv + "=" + unitScorer, "--policy", u.Policy, "--policy", u.spolicy,
		"--key", u.Key("rita"), "--reason", fmt.Sprintf("unit %d", n)}
}

// logOf runs log --json on target: its exit code and, for exit 5, whether
// the one damage finding is the documented interrupted state.
func (u *unitWorld) logOf(target string) (code int, interrupted bool, rep clitest.LogReport) {
	u.T.Helper()
	r := clitest.MG(u.T, u.Store, "log", "--json", target)
	if err := json.Unmarshal([]byte(r.Stdout), &rep); err != nil {
		u.T.Fatalf("log --json %s: exit %d, %v\n%s%s", target, r.Code, err, r.Stdout, r.Stderr)
	}
	var damage []string
	for _, f := range rep.Findings {
		if f.Severity == "damage" {
			damage = append(damage, f.Message)
		}
	}
	if r.Code == 5 && len(damage) == 1 && strings.HasPrefix(damage[0], "interrupted: record ") {
		interrupted = true
	}
	return r.Code, interrupted, rep
}

// checkCrash checks the store after a kill (or a finished run) of a
// release that moves the encoder from oldE to newE and the scorer from
// oldS to newS; it returns whether a log shows the interrupted state.
func (u *unitWorld) checkCrash(what string, before map[string]string, oldE, newE, oldS, newS string) bool {
	t := u.T
	t.Helper()
	clitest.MustVerify(t, u.Store, what)
	after := clitest.StoreTags(t, u.Store)
	for k, v := range before {
		switch k {
		case unitEnc, unitScorer, "tiny-encoder:release-prod", "tiny-scorer:release-prod":
		default:
			if after[k] != v {
				t.Fatalf("%s: %s moved from %s to %q", what, k, v, after[k])
			}
		}
	}
	e, s := after[unitEnc], after[unitScorer]
	if (e != oldE && e != newE) || (s != oldS && s != newS) {
		t.Fatalf("%s: encoder %s (old %s, new %s), scorer %s (old %s, new %s)", what, e, oldE, newE, s, oldS, newS)
	}
	interrupted := false
	for _, target := range []string{unitEnc, unitScorer} {
		code, in, rep := u.logOf(target)
		switch {
		case code == 0:
		case in:
			interrupted = true
		default:
			t.Fatalf("%s: log %s exit %d: %+v", what, target, code, rep.Findings)
		}
	}
	matched := (e == oldE && s == oldS) || (e == newE && s == newS)
	if !matched && !interrupted {
		t.Fatalf("%s: encoder %s with scorer %s, a pair no record explains (no log shows an interrupted release)", what, e, s)
	}
	return interrupted
}

// logsVerify requires both logs to verify against their policies.
func (u *unitWorld) logsVerify(what string) {
	u.T.Helper()
	for _, a := range [][]string{{unitEnc, u.Policy}, {unitScorer, u.spolicy}} {
		if r := clitest.MG(u.T, u.Store, "log", a[0], "--policy", a[1]); r.Code != 0 {
			u.T.Fatalf("%s: log %s exit %d\n%s%s", what, a[0], r.Code, r.Stdout, r.Stderr)
		}
	}
}

func (u *unitWorld) tags() (string, string) {
	u.T.Helper()
	tags := clitest.StoreTags(u.T, u.Store)
	return tags[unitEnc], tags[unitScorer]
}

// registryUnitSteps are the crash points tried on docker-registry: one of
// each kind (record, claim, move, mark), first and second tag alternating.
// The in-process registry has the same tag semantics and is killed after
// every step, as are the local store and the GCS emulator.
var registryUnitSteps = []string{"record:2", "claim:1", "move:2", "mark:1"}

// crashUnitRelease runs the crash suite of a release of two tags on store,
// killed after each of steps.
func crashUnitRelease(t *testing.T, store string, steps []string) {
	u := newUnitWorld(t, store)
	completedBy := map[string]int{}
	for i, step := range steps {
		// promote --with, killed after step.
		oldE, oldS := u.tags()
		newE, newS, promote := u.candidates()
		before := clitest.StoreTags(t, store)
		what := fmt.Sprintf("promote killed after %s", step)
		k := clitest.RunCrashAt(t, store, step, promote...)
		if k.Finished {
			t.Fatalf("%s: the run was not killed (exit %d): %s%s", what, k.Res.Code, k.Res.Stdout, k.Res.Stderr)
		}
		pending := u.checkCrash(what, before, oldE, newE, oldS, newS)
		// The next promote (every other step: the same command again) or
		// rollback (the others) completes the release first.
		e, s := u.tags()
		tookEffect := pending || (e == newE && s == newS)
		var r clitest.Result
		want := [2]string{newE, newS}
		if i%2 == 0 {
			r = clitest.MustMG(t, store, promote...)
			completedBy["promote"]++
		} else {
			if tookEffect {
				// Undoing this release restores the pair before it.
				want = [2]string{oldE, oldS}
			} else {
				// It changed nothing visible: the rollback undoes the
				// release before it, as its dry run says.
				var dry struct{ With []struct{ Target, To string } }
				if err := json.Unmarshal([]byte(clitest.MustMG(t, store, "rollback", unitScorer, "--reason", "dry", "--dry-run", "--json").Stdout), &dry); err != nil || len(dry.With) != 2 {
					t.Fatalf("%s: rollback --dry-run --json: %v %+v", what, err, dry)
				}
				for _, m := range dry.With {
					if m.Target == unitEnc {
						want[0] = m.To
					} else {
						want[1] = m.To
					}
				}
			}
			r = clitest.MustMG(t, store, "rollback", unitScorer, "--reason", "after "+what, "--key", u.Key("rita"))
			completedBy["rollback"]++
		}
		if pending && !strings.Contains(r.Stdout, "completed an interrupted release first") {
			t.Fatalf("%s: the next command did not complete the interrupted release:\n%s", what, r.Stdout)
		}
		if e, s := u.tags(); e != want[0] || s != want[1] {
			t.Fatalf("%s: after completing, encoder %s scorer %s, want %s %s", what, e, s, want[0], want[1])
		}
		clitest.MustVerify(t, store, what+", completed")
		u.logsVerify(what + ", completed")
	}
	// A rollback of the unit, killed after each step: the next promote
	// (of the pair it restores) or the rollback run again completes it.
	for _, step := range steps {
		_, _, promote := u.candidates()
		clitest.MustMG(t, store, promote...)
		newE, newS := u.tags()
		oldE, oldS := "", ""
		var dry struct {
			With []struct{ Target, From, To string }
		}
		if err := json.Unmarshal([]byte(clitest.MustMG(t, store, "rollback", unitEnc, "--reason", "dry", "--dry-run", "--json").Stdout), &dry); err != nil || len(dry.With) != 2 {
			t.Fatalf("rollback --dry-run --json: %v %+v", err, dry)
		}
		for _, m := range dry.With {
			if m.Target == unitEnc {
				oldE = m.To
			} else {
				oldS = m.To
			}
		}
		before := clitest.StoreTags(t, store)
		what := fmt.Sprintf("rollback killed after %s", step)
		k := clitest.RunCrashAt(t, store, step, "rollback", unitEnc, "--reason", what, "--key", u.Key("rita"))
		if k.Finished {
			t.Fatalf("%s: the run was not killed (exit %d): %s%s", what, k.Res.Code, k.Res.Stdout, k.Res.Stderr)
		}
		// The rollback moves the encoder from new to old: the same check
		// with the roles of old and new swapped.
		pending := u.checkCrash(what, before, newE, oldE, newS, oldS)
		if pending {
			r := clitest.MustMG(t, store, "promote", "tiny-encoder@"+oldE, "--to", unitEnc, "--with", "tiny-scorer@"+oldS+"="+unitScorer,
				"--policy", u.Policy, "--policy", u.spolicy, "--key", u.Key("rita"))
			if !strings.Contains(r.Stdout, "completed an interrupted release first") || !strings.Contains(r.Stdout, "nothing to do") {
				t.Fatalf("%s: the next promote did not complete the interrupted rollback:\n%s", what, r.Stdout)
			}
			completedBy["promote"]++
		} else if e, _ := u.tags(); e == newE {
			clitest.MustMG(t, store, "rollback", unitEnc, "--reason", "again after "+what, "--key", u.Key("rita"))
		}
		if e, s := u.tags(); e != oldE || s != oldS {
			t.Fatalf("%s: after completing, encoder %s scorer %s, want %s %s", what, e, s, oldE, oldS)
		}
		clitest.MustVerify(t, store, what+", completed")
		u.logsVerify(what + ", completed")
	}
	t.Logf("%d kill points for promote --with and %d for its rollback; completed by: %v", len(steps), len(steps), completedBy)
}

// TestCrashDuringUnitRelease: the local store, the GCS emulator, an
// in-process registry and, when MODELGATE_TEST_REGISTRY names one (CI
// starts it with .ci/services.sh), docker-registry. A registry has no
// compare-and-swap on tags, but one process at a time is killed here: what
// a kill leaves must be the same states as on the other stores. Every step
// is killed on the first three; docker-registry, the slowest by far, gets
// one kill of each kind of step (registryUnitSteps).
func TestCrashDuringUnitRelease(t *testing.T) {
	if testing.Short() {
		t.Skip("crash suite skipped with -short")
	}
	for _, k := range clitest.EveryStore(t, "unitcrash") {
		if k.Name == "registry-no-catalog" {
			continue // verify and ls need the repository names there; "registry" has the same tag semantics
		}
		steps := unitSteps
		if k.Name == "docker-registry" {
			steps = registryUnitSteps
		}
		t.Run(k.Name, func(t *testing.T) { crashUnitRelease(t, k.Loc, steps) })
	}
}

// TestUnitReleaseRace: 8 processes release different encoder/scorer pairs
// of the same two tags at once, each gated against the same state; on
// the local store and the GCS emulator exactly one wins, the others exit
// 3 with nothing of theirs visible, the tags hold the winner's pair and
// both logs verify.
func TestUnitReleaseRace(t *testing.T) {
	if testing.Short() {
		t.Skip("8 release processes per store kind")
	}
	for _, k := range clitest.EveryStore(t, "unitrace") {
		if k.Name != "local" && k.Name != "gcs" {
			continue
		}
		t.Run(k.Name, func(t *testing.T) {
			u := newUnitWorld(t, k.Loc)
			type racer struct {
				enc, sc string
				args    []string
				res     clitest.Result
			}
			racers := make([]*racer, 8)
			for i := range racers {
				e, s, args := u.candidates()
				racers[i] = &racer{enc: e, sc: s, args: args}
			}
			var wg sync.WaitGroup
			for _, r := range racers {
				wg.Add(1)
				go func() { defer wg.Done(); r.res = clitest.MG(t, k.Loc, r.args...) }()
			}
			wg.Wait()
			var winners []*racer
			for _, r := range racers {
				switch r.res.Code {
				case 0:
					winners = append(winners, r)
				case 3:
				default:
					t.Fatalf("a racer exited %d: %s%s", r.res.Code, r.res.Stdout, r.res.Stderr)
				}
			}
			if len(winners) != 1 {
				t.Fatalf("%d of %d racing releases won", len(winners), len(racers))
			}
			if e, s := u.tags(); e != winners[0].enc || s != winners[0].sc {
				t.Fatalf("tags %s %s, the winner released %s %s", e, s, winners[0].enc, winners[0].sc)
			}
			clitest.MustVerify(t, k.Loc, "after the race")
			u.logsVerify("after the race")
		})
	}
}

// TestUnitReleaseCLI: from the command line, the encoder alone is refused
// (exit 4, naming the scorer tag that reads its code and the command that
// moves both) with nothing changed; with --with both move, and the --json
// document of each matches the promote output schema.
func TestUnitReleaseCLI(t *testing.T) {
	u := newUnitWorld(t, filepath.Join(t.TempDir(), "store"))
	oldE, oldS := u.tags()
	_, _, promote := u.candidates()
	alone := append([]string(nil), promote[:4]...) // promote tiny-encoder:vN --to tiny-encoder:prod
	before := clitest.StoreTags(t, u.Store)
	r := clitest.MG(t, u.Store, append(alone, "--policy", u.Policy, "--key", u.Key("rita"))...)
	clitest.WantExit(t, r, 4, "is consumed by tiny-scorer:prod (scorer ", "--with SCORER-CANDIDATE=tiny-scorer:prod")
	if after := clitest.StoreTags(t, u.Store); fmt.Sprint(after) != fmt.Sprint(before) {
		t.Fatalf("the refused promote changed tags:\n%v\n%v", before, after)
	}
	r = clitest.MG(t, u.Store, append(append([]string{"--json"}, alone...), "--policy", u.Policy, "--key", u.Key("rita"))...)
	clitest.CheckJSON(t, "promote", r)
	if r.Code != 4 || !strings.Contains(r.Stdout, "tiny-scorer:prod") {
		t.Fatalf("promote --json of the encoder alone: exit %d\n%s", r.Code, r.Stdout)
	}
	r = clitest.MustMG(t, u.Store, append([]string{"--json"}, promote...)...)
	clitest.CheckJSON(t, "promote", r)
	var out struct {
		Result struct {
			Members []struct{ Target, From, To string }
		}
	}
	if err := json.Unmarshal([]byte(r.Stdout), &out); err != nil || len(out.Result.Members) != 2 ||
		out.Result.Members[0].Target != unitScorer || out.Result.Members[0].From != oldS || out.Result.Members[1].From != oldE {
		t.Fatalf("promote --with --json: %v\n%s", err, r.Stdout)
	}
	r = clitest.MustMG(t, u.Store, "rollback", "--json", unitEnc, "--reason", "drill", "--key", u.Key("rita"))
	clitest.CheckJSON(t, "rollback", r)
	if e, s := u.tags(); e != oldE || s != oldS {
		t.Fatalf("after the rollback of the encoder: %s %s, want %s %s", e, s, oldE, oldS)
	}
	u.logsVerify("after the CLI release and rollback")
}
