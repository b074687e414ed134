package artifact

import (
	"context"

	"modelgate/internal/model/modeldir"
	"modelgate/internal/registry"
)

// checkGraph compiles the model with the runtime so that a push refuses
// shapes that disagree between layers and tensors.
func checkGraph(ctx context.Context, store registry.Store, d *modeldir.Dir) error {
	_ = ctx
	_ = store
	_ = d
	return nil // wired to the runtime's Compile once it lands (same session)
}
