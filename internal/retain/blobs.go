package retain

import (
	"context"
	"errors"
	"fmt"
	"sort"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/registry"
)

// ListBlobs returns the store's content blobs with their modification
// times, for Options.Blobs: every repository's list once when the store
// shares blobs between repositories. nil when the store cannot list blobs
// (an OCI registry).
func ListBlobs(ctx context.Context, store registry.Store) ([]StoredBlob, error) {
	d, ok := store.(registry.Deleter)
	if !ok {
		return nil, nil
	}
	repos, err := store.Repositories(ctx)
	if err != nil {
		return nil, fmt.Errorf("listing repositories: %w", err)
	}
	if d.SharesBlobs() && len(repos) > 1 {
		repos = repos[:1] // one list is the whole store's
	}
	seen := map[v1.Hash]bool{}
	out := []StoredBlob{}
	for _, repo := range repos {
		bs, err := d.Blobs(ctx, repo)
		if errors.Is(err, errors.ErrUnsupported) {
			return nil, nil
		}
		if err != nil {
			return nil, fmt.Errorf("listing blobs: %w", err)
		}
		for _, b := range bs {
			if !seen[b.Digest] {
				seen[b.Digest] = true
				out = append(out, StoredBlob{Digest: b.Digest, Size: b.Size, Modified: b.Modified, Version: b.Version})
			}
		}
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Digest.String() < out[j].Digest.String() })
	return out, nil
}
