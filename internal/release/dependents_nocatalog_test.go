package release

import (
	"context"
	"fmt"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// noCatalogStore is a store that cannot list its repositories, as a
// registry with its catalog endpoint switched off.
type noCatalogStore struct{ registry.Store }

func (noCatalogStore) Repositories(context.Context) ([]string, error) {
	return nil, errkind.New(errkind.BadInput, "%w: catalog switched off", registry.ErrNoCatalog)
}

func (n noCatalogStore) SwapTag(ctx context.Context, repo, tag string, old v1.Hash, desc v1.Descriptor) error {
	return n.Store.(registry.TagSwapper).SwapTag(ctx, repo, tag, old, desc)
}

// TestDependentsWithoutCatalog: where the store cannot list repositories,
// Dependents still finds a released scorer tag in a repository no policy
// names, through the consumer marker its release left on the encoder; a
// marker whose tag has since moved to a scorer of another encoder does not
// count, and neither does a scorer that was only pushed. (Before the
// markers, Dependents refused here, asking for the scorers' policies.)
func TestDependentsWithoutCatalog(t *testing.T) {
	e := newEnv(t, envOptions{})
	e.initial(prodRef, e.models[0])
	s0 := e.pushScorer(0, e.models[0], "v0")
	e.initial(scorerProd, s0)
	e.pushScorer(1, e.models[0], "v1") // pushed, never released
	nc := noCatalogStore{e.store}
	deps, err := Dependents(e.ctx, nc, prodRef, e.models[0].String(), nil)
	if err != nil {
		t.Fatal(err)
	}
	if got := fmt.Sprint(deps); len(deps) != 1 || deps[0].Target != scorerProd.String() || deps[0].Scorer != s0.String() {
		t.Fatalf("dependents of %s without a catalog: %s; want tiny-scorer:prod (%s) alone", e.models[0], got, s0)
	}
	// The encoder refuses to move alone there, naming the scorer tag.
	e.report(e.models[1], e.models[0], e.pol, "pass", nil)
	_, err = Promote(e.ctx, nc, PromoteRequest{Candidate: e.models[1], Target: prodRef, User: "tester", Now: e.now})
	wantRefusal(t, err, errkind.Unauthorized, "tiny-scorer:prod (scorer "+shortHex(s0.String())+")")

	// A scorer tag released on a scorer of models[0], then moved to a
	// scorer of models[3]: its marker on models[0] stays but no longer
	// counts.
	canary := registry.Ref{Repository: scorerRepo, Tag: "canary"}
	sc := e.pushScorer(2, e.models[0], "v2")
	if _, err := Initial(e.ctx, e.store, InitialRequest{Target: canary, To: sc, User: "setup", Now: e.now}); err != nil {
		t.Fatal(err)
	}
	if deps, err := Dependents(e.ctx, nc, prodRef, e.models[0].String(), nil); err != nil || len(deps) != 2 {
		t.Fatalf("dependents with the canary released: %v, %v; want 2", deps, err)
	}
	s3 := e.pushScorer(3, e.models[3], "v3")
	d3, err := subjectOf(e.ctx, e.store, scorerRepo, s3)
	if err != nil {
		t.Fatal(err)
	}
	if err := e.store.SwapTag(e.ctx, scorerRepo, "canary", sc, d3); err != nil {
		t.Fatal(err)
	}
	deps, err = Dependents(e.ctx, nc, prodRef, e.models[0].String(), nil)
	if err != nil || len(deps) != 1 || deps[0].Target != scorerProd.String() {
		t.Fatalf("dependents after the canary moved to another encoder's scorer: %v, %v; want tiny-scorer:prod alone", deps, err)
	}
}
