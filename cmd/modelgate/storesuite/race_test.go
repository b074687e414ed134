package storesuite

import (
	"encoding/json"
	"fmt"
	"sync"
	"testing"

	"github.com/modelgate/modelgate/internal/clitest"
)

// TestConcurrentPromote: 16 promote processes, each with its own gated
// candidate against the same baseline, race for one tag on the local
// store: exactly one wins, the others exit 3, and the log is linear and
// verifies.
func TestConcurrentPromote(t *testing.T) {
	racePromotes(t, clitest.NewWorld(t, 0), true)
}

// racePromotes races 16 promote processes of different gated candidates
// from one baseline. With a compare-and-swap store (exact true) exactly
// one wins, the others exit 3, and the log is linear and verifies.
// Without one (a plain OCI registry) it checks the guarantee that store
// gives: at least one wins, every other exits 3, and if more than one
// believed it won, `log` does not verify: the overwritten winner's record
// carries its committed marker but is out of the chain (the race is
// exposed, never silently lost).
func racePromotes(t *testing.T, w *clitest.World, exact bool) {
	base := w.Push(0, "tiny-encoder:prod")
	const n = 16
	cands := make([]string, n)
	for i := range cands {
		cands[i] = w.Push(i+1, "")
		w.Gate(fmt.Sprintf("tiny-encoder:v%d", i+1))
	}
	var wg sync.WaitGroup
	results := make([]clitest.Result, n)
	for i := range n {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			results[i] = w.Promote(fmt.Sprintf("tiny-encoder:v%d", i+1), "--key", w.Key("rita"))
		}(i)
	}
	wg.Wait()
	if !exact {
		raceWithoutCAS(t, w, results, cands, base)
		return
	}
	winner, winners := -1, 0
	for i, r := range results {
		switch r.Code {
		case 0:
			winners++
			if winner >= 0 {
				t.Errorf("promotes %d and %d both succeeded", winner, i)
			}
			winner = i
		case 3:
		default:
			t.Errorf("promote %d: exit %d, want 0 or 3: %s", i, r.Code, r.Stderr)
		}
	}
	if winner < 0 {
		t.Fatal("no promote succeeded")
	}
	t.Logf("%d of %d promotes won, the others exited 3", winners, len(results))
	if got := w.Prod(); got != cands[winner] {
		t.Errorf("the tag points at %s, the winner promoted %s", got, cands[winner])
	}
	var rep struct {
		Entries  []struct{ Record struct{ From, To string } }
		Findings []struct{ Severity, Message string }
	}
	r := clitest.MustMG(t, w.Store, "log", "--json", "tiny-encoder:prod", "--policy", w.Policy)
	if err := json.Unmarshal([]byte(r.Stdout), &rep); err != nil {
		t.Fatal(err)
	}
	if len(rep.Entries) != 1 || rep.Entries[0].Record.To != cands[winner] {
		t.Errorf("log: %+v", rep.Entries)
	}
	for _, f := range rep.Findings {
		if f.Severity != "note" {
			t.Errorf("finding: %+v", f)
		}
	}
}

// raceWithoutCAS checks what a store without compare-and-swap on tags
// guarantees after racing promotes (an OCI registry): no race is lost
// silently. Each promote exits 0 (it believes it won), 3 (it saw the tag
// move) or 5 (it saw the release log disagree with the tag mid-race); and
// either the outcome is consistent — `log` verifies, exactly one promote
// won, and the tag points at its candidate — or `log` does not verify,
// exposing the race.
func raceWithoutCAS(t *testing.T, w *clitest.World, results []clitest.Result, cands []string, base string) {
	t.Helper()
	winner, winners := -1, 0
	for i, r := range results {
		switch r.Code {
		case 0:
			winner, winners = i, winners+1
		case 3, 5:
		default:
			t.Errorf("promote %d: exit %d, want 0, 3 or 5: %s", i, r.Code, r.Stderr)
		}
	}
	lg := clitest.MG(t, w.Store, "log", "tiny-encoder:prod", "--policy", w.Policy)
	if lg.Code != 0 {
		t.Logf("%d promote(s) believed they won; log exposes the race (exit %d)", winners, lg.Code)
		return
	}
	if winners == 0 && w.Prod() == base {
		t.Logf("no promote won; the tag is unchanged and log verifies")
		return
	}
	if winners != 1 {
		t.Fatalf("%d promotes believed they won and log still verifies: a lost race went unnoticed", winners)
	}
	if got := w.Prod(); got != cands[winner] {
		t.Fatalf("log verifies but the tag points at %s, not the winner's %s", got, cands[winner])
	}
	t.Logf("1 of %d promotes won; the outcome is consistent and log verifies", len(results))
}
