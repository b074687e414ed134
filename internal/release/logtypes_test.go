package release

import (
	"testing"

	"github.com/modelgate/modelgate/internal/registry"
)

// The store refuses to remove release log manifests by their artifact
// type, which it names without importing this package: the two lists must
// agree.
func TestReleaseLogTypesGuardedByStore(t *testing.T) {
	for _, at := range []string{ArtifactTypeRelease, ArtifactTypeCommitted, ArtifactTypeEnded} {
		if !registry.IsReleaseLogType(at) {
			t.Errorf("registry.IsReleaseLogType(%q) = false: the store would let a collector remove it", at)
		}
	}
	for _, at := range []string{ArtifactTypeApproval, ArtifactTypeConsumer, ArtifactTypePolicy} {
		if registry.IsReleaseLogType(at) {
			t.Errorf("registry.IsReleaseLogType(%q) = true, want false", at)
		}
	}
}
