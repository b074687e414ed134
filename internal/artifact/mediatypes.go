// Package artifact turns model directories into OCI artifacts in a store
// and back: push, pull, load for the runtime, and whole-store verification.
package artifact

import "github.com/google/go-containerregistry/pkg/v1/types"

// Media types of modelgate's blobs. All are ours (vnd.modelgate).
const (
	MediaTypeSpec           types.MediaType = "application/vnd.modelgate.spec.v1+json"
	MediaTypeTensors        types.MediaType = "application/vnd.modelgate.tensors.v1.safetensors"
	MediaTypeVocabulary     types.MediaType = "application/vnd.modelgate.vocabulary.v1.txt"
	MediaTypeStats          types.MediaType = "application/vnd.modelgate.stats.v1+json"
	MediaTypeProbes         types.MediaType = "application/vnd.modelgate.probes.v1.jsonl"
	MediaTypeHoldoutParquet types.MediaType = "application/vnd.modelgate.holdout.v1.parquet"
	MediaTypeHoldoutJSONL   types.MediaType = "application/vnd.modelgate.holdout.v1.jsonl"

	// MediaTypeEmpty is the OCI empty descriptor's media type (image-spec v1.1).
	MediaTypeEmpty types.MediaType = "application/vnd.oci.empty.v1+json"
)

// ArtifactType returns the artifactType of an artifact of the given kind
// (encoder, scorer, holdout, report, approval, release).
func ArtifactType(kind string) string { return "application/vnd.modelgate." + kind + ".v1" }

// Annotation keys of our own, under dev.modelgate.
const (
	AnnotationKind         = "dev.modelgate.kind"
	AnnotationName         = "dev.modelgate.name"
	AnnotationEncoder      = "dev.modelgate.encoder.digest"
	AnnotationTrainingData = "dev.modelgate.training-data.digest"
	AnnotationToolVersion  = "dev.modelgate.tool.version"
	AnnotationPart         = "dev.modelgate.part"
)
