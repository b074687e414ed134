package registry

import (
	"context"
	"errors"
	"slices"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// FindManifest returns a repository of store that holds the manifest dgst.
// It looks in the repositories first names (in order; empty names are
// skipped) before it lists the store, so that a lookup whose repository is
// known costs no listing and works on registries without a catalog. When
// the manifest is in none of them and the store cannot list its
// repositories, the error wraps ErrNoCatalog; when it is nowhere, it wraps
// ErrNotFound (errkind.BadInput). Other failures (authorisation, network)
// are returned as they are.
func FindManifest(ctx context.Context, store Store, dgst v1.Hash, first ...string) (string, error) {
	tried := map[string]bool{}
	try := func(repo string) (bool, error) {
		if repo == "" || tried[repo] {
			return false, nil
		}
		tried[repo] = true
		if _, _, err := store.Manifest(ctx, repo, dgst); err != nil {
			if errors.Is(err, ErrNotFound) {
				return false, nil
			}
			return false, err
		}
		return true, nil
	}
	for _, repo := range first {
		if ok, err := try(repo); ok || err != nil {
			return repo, err
		}
	}
	all, err := store.Repositories(ctx)
	if err != nil {
		return "", err
	}
	for _, repo := range slices.Sorted(slices.Values(all)) {
		if ok, err := try(repo); ok || err != nil {
			return repo, err
		}
	}
	return "", errkind.New(errkind.BadInput, "manifest %s: %w", dgst, ErrNotFound)
}
