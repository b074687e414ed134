package artifact_test

import (
	"context"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/registry"
)

// TestModelFilesLayerLimits: a model manifest whose vocabulary, stats or
// probes layer claims more bytes than a model directory allows for that
// file is refused as store damage, naming the limit, before the blob is
// read (without the per-file limits, such layers were read up to
// MaxBlobSize, 8 GiB, each); a tensor layer is held to MaxBlobSize.
func TestModelFilesLayerLimits(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	if _, err := fixture.Write(dir); err != nil {
		t.Fatal(err)
	}
	s, err := registry.OpenLocal(filepath.Join(t.TempDir(), "store"))
	if err != nil {
		t.Fatal(err)
	}
	ref, err := registry.ParseRef("tiny-encoder:v1", false)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := artifact.PushModelDir(ctx, s, filepath.Join(dir, fixture.EncoderDir), ref, artifact.Options{}); err != nil {
		t.Fatal(err)
	}
	a, err := artifact.ReadArtifact(ctx, s, ref)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := artifact.ModelFiles(ctx, s, a); err != nil {
		t.Fatalf("the artifact as pushed: %v", err)
	}
	for _, c := range []struct {
		mediaType string
		size      int64
	}{
		{string(artifact.MediaTypeVocabulary), modeldir.MaxVocabSize + 1},
		{string(artifact.MediaTypeStats), modeldir.MaxStatsSize + 1},
		{string(artifact.MediaTypeProbes), modeldir.MaxProbesSize + 1},
		{string(artifact.MediaTypeTensors), artifact.MaxBlobSize + 1},
	} {
		t.Run(c.mediaType, func(t *testing.T) {
			b := *a
			b.Manifest.Layers = append(b.Manifest.Layers[:0:0], a.Manifest.Layers...)
			found := false
			for i, l := range b.Manifest.Layers {
				if string(l.MediaType) == c.mediaType && !found {
					b.Manifest.Layers[i].Size = c.size
					found = true
				}
			}
			if !found {
				t.Fatalf("the fixture has no %s layer", c.mediaType)
			}
			_, err := artifact.ModelFiles(ctx, s, &b)
			if !errkind.Is(err, errkind.Integrity) || !strings.Contains(err.Error(), "over the") {
				t.Errorf("artifact.ModelFiles: %v, want an integrity error for a layer over its limit", err)
			}
		})
	}
}
