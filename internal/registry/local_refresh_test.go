package registry_test

import (
	"testing"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/registry/storetest"
)

// TestLocalReuseRaces: a push of the very bytes of an artifact a
// collection judged old keeps it, when it comes after the mark and when
// it comes inside the removal, after the store checked the version and
// before it moved anything aside (the store's removal hook).
func TestLocalReuseRaces(t *testing.T) {
	l := openLocal(t)
	t.Cleanup(func() { registry.SetRemovalHook(nil) })
	storetest.ReuseRaces(t, l, func(f func()) {
		registry.SetRemovalHook(func(step string) {
			if step == registry.RemovalChecked {
				registry.SetRemovalHook(nil)
				f()
			}
		})
	})
}
