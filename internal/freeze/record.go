package freeze

import (
	"context"
	"encoding/json"
	"fmt"
	"sort"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/version"
)

// ReportKind is the artifact kind of a freeze record: a report
// (artifactType application/vnd.modelgate.report.v1).
const ReportKind = "report"

// pushRecord stores rec as a report artifact in repo, untagged, whose
// subject is the frozen scorer's manifest: the OCI referrers API (or its
// tag fallback) finds it from the scorer. Like the gate's reports, the
// record's JSON is the config blob (media type MediaTypeRecord); there are
// no layers. It returns the record's manifest digest.
func pushRecord(ctx context.Context, store registry.Store, repo string, subject v1.Descriptor, rec *Record, progress func(artifact.Event)) (string, error) {
	b, err := json.MarshalIndent(rec, "", "  ")
	if err != nil {
		return "", fmt.Errorf("encoding the freeze record: %w", err)
	}
	config := artifact.NewBlob(types.MediaType(MediaTypeRecord), append(b, '\n'), nil)
	ann := map[string]string{
		artifact.AnnotationKind:        ReportKind,
		AnnotationReportType:           "freeze",
		artifact.AnnotationCreated:     rec.Created,
		artifact.AnnotationToolVersion: version.Version,
		artifact.AnnotationEncoder:     rec.Encoder.Digest,
		AnnotationFrozenFrom:           rec.Source.Digest,
	}
	res, err := artifact.PushArtifact(ctx, store, registry.Ref{Repository: repo}, artifact.ArtifactType(ReportKind), config,
		nil, subjectOf(subject), ann, artifact.Options{Progress: progress})
	if err != nil {
		return "", err
	}
	return res.Digest, nil
}

// Records returns the freeze records stored as referrers of the frozen
// scorer digest in repo, newest first (by their created time).
func Records(ctx context.Context, store registry.Store, repo string, scorer v1.Hash) ([]*Record, error) {
	ds, err := store.Referrers(ctx, repo, scorer, artifact.ArtifactType(ReportKind))
	if err != nil {
		return nil, err
	}
	var out []*Record
	for _, d := range ds {
		a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: d.Digest})
		if err != nil {
			return nil, err
		}
		if a.Manifest.Annotations[AnnotationReportType] != "freeze" || string(a.Manifest.Config.MediaType) != MediaTypeRecord {
			continue
		}
		b, err := artifact.ReadBlob(ctx, store, repo, a.Manifest.Config, 64<<20)
		if err != nil {
			return nil, err
		}
		var r Record
		if err := json.Unmarshal(b, &r); err != nil {
			return nil, fmt.Errorf("freeze record %s: %w", d.Digest, err)
		}
		out = append(out, &r)
	}
	sort.SliceStable(out, func(i, j int) bool { return out[i].Created > out[j].Created })
	return out, nil
}
