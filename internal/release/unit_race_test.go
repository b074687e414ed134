package release

import (
	"context"
	"sync"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// hookStore is a store whose tag swaps call before and after (with the
// repo and tag; after only on success), so a test can hold one process at
// an exact step while another runs.
type hookStore struct {
	registry.Store
	before, after func(repo, tag string)
}

func (h hookStore) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	if h.before != nil {
		h.before(repo, tag)
	}
	if err := h.Store.(registry.TagSwapper).SwapTag(ctx, repo, tag, old, desc); err != nil {
		return err
	}
	if h.after != nil {
		h.after(repo, tag)
	}
	return nil
}

// pauseAt returns a hook that, the first time it sees repo:tag, signals
// reached and waits for resume.
func pauseAt(repo, tag string, reached, resume chan struct{}) func(string, string) {
	var once sync.Once
	return func(r, tg string) {
		if r == repo && tg == tag {
			once.Do(func() { close(reached); <-resume })
		}
	}
}

// TestOnePromoteRacingUnitRelease: a one-tag promote of the scorer tag
// reads its state before a release of the encoder and that scorer claims
// the two logs, and moves the tag after the release read it but before
// the claim; its own head move comes after the claim. The promote then
// puts the tag back and ends as a conflict (exit 3), the release goes on
// and completes, and both logs verify. Before, the promote exited 5
// (integrity) and left the scorer tag where no record says, the release
// gave up on it, and log reported a tag moved outside modelgate.
func TestOnePromoteRacingUnitRelease(t *testing.T) {
	w := newUnitWorld(t)
	// The one-tag candidate: another scorer of the live encoder, gated
	// against the live scorer.
	sx := w.pushScorer(5, w.models[0], "v5")
	w.reportFor(scorerProd, "scorer", sx, w.s0, w.spol)

	unitReady, unitGo := make(chan struct{}), make(chan struct{})    // before the release's first claim
	unitClaimed, unitGo2 := make(chan struct{}), make(chan struct{}) // after its last claim
	oneMoved, oneGo := make(chan struct{}), make(chan struct{})      // after the promote's tag move
	unitStore := hookStore{Store: w.store,
		before: pauseAt(scorerRepo, "release-prod", unitReady, unitGo),
		after:  pauseAt(testRepo, "release-prod", unitClaimed, unitGo2)}
	oneStore := hookStore{Store: w.store, after: pauseAt(scorerRepo, "prod", oneMoved, oneGo)}

	unitErr, oneErr := make(chan error, 1), make(chan error, 1)
	go func() {
		_, err := PromoteUnit(w.ctx, unitStore, w.unit(w.models[1], w.s1))
		unitErr <- err
	}()
	<-unitReady // the release has read both tags and written its record
	go func() {
		_, err := Promote(w.ctx, oneStore, PromoteRequest{Candidate: sx, Target: scorerProd, Policy: w.spol, User: "tester", Now: w.now})
		oneErr <- err
	}()
	<-oneMoved // the promote moved the scorer tag; its head move waits
	close(unitGo)
	<-unitClaimed // the release claimed both heads
	close(oneGo)
	err := <-oneErr
	wantRefusal(t, err, errkind.Conflict, "claimed the release log of tiny-scorer:prod", "put back to "+w.s0.String())
	close(unitGo2)
	if err := <-unitErr; err != nil {
		t.Fatalf("the release: %v", err)
	}
	if w.tag(prodRef) != w.models[1].String() || w.tag(scorerProd) != w.s1.String() {
		t.Fatalf("tags after the race: %s %s; want the release's", w.tag(prodRef), w.tag(scorerProd))
	}
	w.mustVerify("after the race")
}
