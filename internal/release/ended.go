package release

import (
	"context"
	"encoding/json"
	"fmt"
	"sort"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/registry"
)

// A rollback ends the gate reports and approvals of the models it takes
// the tag away from: they led to a release that was undone, so promoting
// such a model again needs a new gate report and new approvals. The
// rollback record lists them (Record.Ended, signed), and an "ended" marker
// stored as a referrer of each such model lets promote find them with one
// listing. Markers are written before the tag moves, so a rollback that
// crashes or loses a race may still end approvals (approve again); it can
// never leave them counting. Deleting a marker does not bring approvals
// back unseen: log checks every promotion against the Ended lists of the
// rollbacks before it.

// ArtifactTypeEnded marks, as a referrer of a model, the gate reports and
// approvals of that model a rollback ended.
var ArtifactTypeEnded = artifact.ArtifactType("ended")

// MediaTypeEnded is the media type of an ended marker's one layer.
const MediaTypeEnded types.MediaType = "application/vnd.modelgate.ended.v1+json"

// EndedRelease is a rollback that took a tag away from a model, ending
// the model's gate reports and approvals for that tag.
type EndedRelease struct {
	Target string `json:"target"`
	// Model is the model the tag was taken away from.
	Model string `json:"model"`
	// Record is the rollback record.
	Record string `json:"record"`
	Reason string `json:"reason"`
	By     string `json:"by"`
	Time   string `json:"time"`
	// Ended are the gate report and approval digests that no longer count.
	Ended []string `json:"ended"`
}

// endedSet is what the markers of one model say for one target.
type endedSet struct {
	digests   map[string]string // report or approval digest → why it no longer counts
	rollbacks []EndedRelease    // oldest first
}

// endedFor reads the ended markers of model cand for target.
func endedFor(ctx context.Context, store registry.Store, repo, cand, target string) (endedSet, error) {
	es := endedSet{digests: map[string]string{}}
	cd, err := registry.ParseDigest(cand)
	if err != nil {
		return es, err
	}
	descs, err := store.Referrers(ctx, repo, cd, ArtifactTypeEnded)
	if err != nil {
		return es, fmt.Errorf("listing the rollbacks that ended approvals of %s: %w", cand, err)
	}
	for _, d := range descs {
		if a := d.Annotations; a != nil && a[AnnotationTarget] != "" && a[AnnotationTarget] != target {
			continue
		}
		e, err := readEnded(ctx, store, repo, d.Digest)
		if err != nil {
			// An unreadable marker cannot say what it ended; it ends
			// nothing, and log still checks the promotions.
			continue
		}
		if e.Target != target || e.Model != cand {
			continue
		}
		es.rollbacks = append(es.rollbacks, *e)
	}
	sort.SliceStable(es.rollbacks, func(i, j int) bool { return es.rollbacks[i].Time < es.rollbacks[j].Time })
	for _, e := range es.rollbacks {
		for _, d := range e.Ended {
			es.digests[d] = fmt.Sprintf("ended by the rollback of %s at %s by %s (%q)", target, e.Time, e.By, e.Reason)
		}
	}
	return es, nil
}

func readEnded(ctx context.Context, store registry.Store, repo string, d v1.Hash) (*EndedRelease, error) {
	a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: d})
	if err != nil {
		return nil, err
	}
	for _, l := range a.Manifest.Layers {
		if l.MediaType != MediaTypeEnded {
			continue
		}
		raw, err := artifact.ReadBlob(ctx, store, repo, l, 16<<20)
		if err != nil {
			return nil, err
		}
		var e EndedRelease
		if err := json.Unmarshal(raw, &e); err != nil {
			return nil, err
		}
		return &e, nil
	}
	return nil, fmt.Errorf("%s@%s has no ended layer", repo, d)
}

// allEnded reports whether every report is ended.
func allEnded(reports []ReportCheck, es endedSet) bool {
	for _, r := range reports {
		if _, ok := es.digests[r.Digest]; !ok {
			return false
		}
	}
	return true
}

// releaseEvidence lists the gate reports and approvals of model for
// target: what a rollback away from it ends. A referrer whose annotations
// do not name its target is included (ending too much is safe).
func releaseEvidence(ctx context.Context, store registry.Store, repo, model, target string) ([]string, error) {
	md, err := registry.ParseDigest(model)
	if err != nil {
		return nil, err
	}
	var out []string
	for _, at := range []string{artifact.ArtifactType("report"), ArtifactTypeApproval} {
		descs, err := store.Referrers(ctx, repo, md, at)
		if err != nil {
			return nil, fmt.Errorf("listing what led to the release of %s: %w", model, err)
		}
		for _, d := range descs {
			if a := d.Annotations; a != nil && a[AnnotationTarget] != "" && a[AnnotationTarget] != target {
				continue
			}
			out = append(out, d.Digest.String())
		}
	}
	sort.Strings(out)
	return out, nil
}

// writeEnded stores the marker of e as a referrer of e.Model.
func writeEnded(ctx context.Context, store registry.Store, repo string, e EndedRelease) error {
	md, err := registry.ParseDigest(e.Model)
	if err != nil {
		return err
	}
	subject, err := subjectOf(ctx, store, repo, md)
	if err != nil {
		return err
	}
	body, err := json.Marshal(e)
	if err != nil {
		return err
	}
	layer := artifact.NewBlob(MediaTypeEnded, body, map[string]string{artifact.AnnotationTitle: "ended.json"})
	_, err = putArtifact(ctx, store, repo, ArtifactTypeEnded, []artifact.Blob{layer}, subject,
		map[string]string{AnnotationTarget: e.Target, artifact.AnnotationCreated: e.Time})
	return err
}

// RolledBack returns the rollbacks that took target away from model, each
// with the reason, oldest first (for views that show a candidate's
// standing).
func RolledBack(ctx context.Context, store registry.Store, model v1.Hash, target registry.Ref) ([]EndedRelease, error) {
	es, err := endedFor(ctx, store, target.Repository, model.String(), target.String())
	return es.rollbacks, err
}
