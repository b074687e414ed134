package registry

import (
	"context"
	"errors"
	"sort"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"
)

// tagResolvers is how many tags tagsPointingAt resolves at once (our own
// choice: enough to hide a round trip's latency, few enough not to flood a
// registry or bucket).
const tagResolvers = 8

// tagsPointingAt resolves tags (tagResolvers at a time) and returns, sorted,
// those that point at dgst; a tag gone meanwhile (ErrNotFound) is skipped,
// and the first other error is returned beside what was found.
func tagsPointingAt(ctx context.Context, tags []string, dgst v1.Hash, resolve func(context.Context, string) (v1.Hash, error)) ([]string, error) {
	var (
		mu    sync.Mutex
		found []string
		first error
		wg    sync.WaitGroup
		sem   = make(chan struct{}, tagResolvers)
	)
	for _, t := range tags {
		wg.Add(1)
		sem <- struct{}{}
		go func(t string) {
			defer func() { <-sem; wg.Done() }()
			d, err := resolve(ctx, t)
			mu.Lock()
			defer mu.Unlock()
			switch {
			case errors.Is(err, ErrNotFound):
			case err != nil:
				if first == nil {
					first = err
				}
			case d == dgst:
				found = append(found, t)
			}
		}(t)
	}
	wg.Wait()
	sort.Strings(found)
	return found, first
}
