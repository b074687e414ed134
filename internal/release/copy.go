package release

import (
	"context"
	"encoding/json"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/registry"
)

// CopyNeeds is a registry.CopyOptions.Needs for modelgate's artifacts: a
// scorer needs its encoder (found in the source by digest, in the
// repository its spec names or any other), and a release record needs the
// model it released (its subject) and the record before it, named by the
// record's previous-record annotation. Copying a tag with a release log
// therefore brings the whole log and every model it released; the
// destination's `log` verifies the signed records as it does anywhere.
func CopyNeeds(ctx context.Context, src registry.Store, repo string, raw []byte) ([]registry.Ref, string, error) {
	var mf struct {
		ArtifactType string            `json:"artifactType"`
		Config       *v1.Descriptor    `json:"config"`
		Subject      *v1.Descriptor    `json:"subject"`
		Annotations  map[string]string `json:"annotations"`
	}
	if err := json.Unmarshal(raw, &mf); err != nil {
		return nil, "", errkind.New(errkind.Integrity, "a manifest of %s is not valid JSON: %v", repo, err)
	}
	switch mf.ArtifactType {
	case ArtifactTypeRelease:
		var needs []registry.Ref
		if mf.Subject != nil {
			needs = append(needs, registry.Ref{Repository: repo, Digest: mf.Subject.Digest})
		}
		return needs, mf.Annotations[AnnotationPrevious], nil
	case artifact.ArtifactType(model.KindScorer):
		if mf.Config == nil {
			return nil, "", nil
		}
		b, err := artifact.ReadBlob(ctx, src, repo, *mf.Config, 16<<20)
		if err != nil {
			return nil, "", err
		}
		var spec struct {
			Encoder *model.EncoderRef `json:"encoder"`
		}
		if err := json.Unmarshal(b, &spec); err != nil || spec.Encoder == nil || spec.Encoder.Digest == "" {
			return nil, "", nil // not a scorer spec that names an encoder: nothing more
		}
		loc, err := artifact.FindEncoder(ctx, src, spec.Encoder)
		if err != nil {
			return nil, "", err
		}
		return []registry.Ref{{Repository: loc.Repository, Digest: loc.Digest}}, "", nil
	}
	return nil, "", nil
}
