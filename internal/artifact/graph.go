package artifact

import (
	"context"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// checkGraph compiles the model with the runtime so that a push refuses
// layers whose shapes or references disagree with the tensors, or a scorer
// whose sparse input differs from its encoder's.
func checkGraph(ctx context.Context, store registry.Store, d *modeldir.Dir) error {
	spec := d.Model.Spec
	var enc *model.Spec
	if spec.Encoder != nil && !spec.Encoder.Embedded {
		loc, err := FindEncoder(ctx, store, spec.Encoder)
		if err != nil {
			return err
		}
		a, err := ReadArtifact(ctx, store, registry.Ref{Repository: loc.Repository, Digest: loc.Digest})
		if err != nil {
			return err
		}
		raw, err := ReadBlob(ctx, store, a.Repository, a.Manifest.Config, modeldir.MaxSpecSize)
		if err != nil {
			return err
		}
		es, vs, err := modeldir.ParseStoredSpec(raw)
		if err != nil {
			return err
		}
		if es == nil || len(vs) > 0 {
			return errkind.New(errkind.Integrity, "the encoder %s in the store has an invalid spec: %v", spec.Encoder.Digest, vs)
		}
		enc = es
	}
	if err := model.CheckGraph(spec, enc); err != nil {
		return errkind.New(errkind.BadInput, "model directory %s: %s: %w", d.Path, modeldir.SpecFile, err)
	}
	return nil
}
