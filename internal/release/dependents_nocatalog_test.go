package release

import (
	"context"
	"strings"
	"testing"

	"modelgate/internal/errkind"
	"modelgate/internal/registry"
)

// noCatalogStore is a store that cannot list its repositories, as a
// registry with its catalog endpoint switched off.
type noCatalogStore struct{ registry.Store }

func (noCatalogStore) Repositories(context.Context) ([]string, error) {
	return nil, errkind.New(errkind.BadInput, "%w: catalog switched off", registry.ErrNoCatalog)
}

// TestDependentsWithoutCatalog: where the store cannot list repositories,
// Dependents searches only what the policies name, and without any policy
// naming a scorer tag it refuses (bad input, asking for those policies)
// rather than report no dependents it could not have found.
func TestDependentsWithoutCatalog(t *testing.T) {
	e := newEnv(t, envOptions{required: 1})
	e.mustPromote(e.models[0])
	_, err := Dependents(e.ctx, noCatalogStore{e.store}, prodRef, e.models[0].String(), nil)
	if errkind.Of(err) != errkind.BadInput || !strings.Contains(err.Error(), "--policy") {
		t.Errorf("Dependents without a catalog or scorer policies: %v (kind %v); want bad input asking for the scorers' policies", err, errkind.Of(err))
	}
}
