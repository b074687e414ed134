package checks

import (
	"context"
	"encoding/json"
	"fmt"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// Media types of a gate report artifact.
const (
	MediaTypeReport     types.MediaType = "application/vnd.modelgate.report.v1+json"
	MediaTypeReportHTML types.MediaType = "text/html"
	// MediaTypeReportEnvelope is the layer of a signed report: a DSSE
	// envelope whose statement binds the report's JSON by digest.
	MediaTypeReportEnvelope types.MediaType = "application/vnd.dsse.envelope.v1+json"
)

// Annotations of a gate report artifact.
const (
	AnnotationReportType = "dev.modelgate.report.type" // "gate"
	AnnotationTarget     = "dev.modelgate.target"
	AnnotationVerdict    = "dev.modelgate.verdict"
	AnnotationBaseline   = "dev.modelgate.baseline.digest"
	AnnotationHoldout    = "dev.modelgate.holdout.digest"
	AnnotationPolicy     = "dev.modelgate.policy.digest"
	// AnnotationSigner is the key id that signed a signed report.
	AnnotationSigner = "dev.modelgate.signer.keyid"
)

// ReportSigner signs a gate report: given the report's exact JSON bytes
// (the artifact's config blob), it returns a DSSE envelope and the id of
// the key that signed it.
type ReportSigner func(ctx context.Context, reportJSON []byte) (envelope []byte, keyID string, err error)

// PushReport stores a gate report as an artifact whose subject is the
// candidate, so the OCI referrers of the candidate find it. html, when
// not nil, is stored beside the JSON. It returns the report's descriptor.
func PushReport(ctx context.Context, store registry.Store, rep *Report, html []byte) (v1.Descriptor, error) {
	return PushSignedReport(ctx, store, rep, html, nil)
}

// PushSignedReport is PushReport with a signature: sign, when not nil, is
// given the report's JSON and its envelope is stored as a further layer
// (MediaTypeReportEnvelope), the signer's key id as an annotation.
func PushSignedReport(ctx context.Context, store registry.Store, rep *Report, html []byte, sign ReportSigner) (v1.Descriptor, error) {
	ref, err := registry.ParseRef(rep.Target, false)
	if err != nil {
		return v1.Descriptor{}, err
	}
	cd, err := registry.ParseDigest(rep.Candidate.Digest)
	if err != nil {
		return v1.Descriptor{}, err
	}
	_, subject, err := store.Manifest(ctx, ref.Repository, cd)
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("the report's candidate %s: %w", rep.Candidate.Digest, err)
	}
	subject.Annotations, subject.ArtifactType = nil, ""
	raw, err := json.Marshal(rep)
	if err != nil {
		return v1.Descriptor{}, err
	}
	config := artifact.NewBlob(MediaTypeReport, raw, nil)
	var layers []artifact.Blob
	if html != nil {
		layers = append(layers, artifact.NewBlob(MediaTypeReportHTML, html, map[string]string{artifact.AnnotationTitle: "report.html"}))
	}
	ann := map[string]string{
		artifact.AnnotationCreated: rep.Created,
		AnnotationReportType:       "gate",
		AnnotationTarget:           rep.Target,
		AnnotationVerdict:          rep.Verdict,
		AnnotationPolicy:           rep.Policy.Digest,
	}
	if rep.Baseline != nil {
		ann[AnnotationBaseline] = rep.Baseline.Digest
	}
	if rep.Holdout != nil {
		ann[AnnotationHoldout] = rep.Holdout.Digest
	}
	if sign != nil {
		env, keyID, err := sign(ctx, raw)
		if err != nil {
			return v1.Descriptor{}, fmt.Errorf("signing the report: %w", err)
		}
		layers = append(layers, artifact.NewBlob(MediaTypeReportEnvelope, env, map[string]string{artifact.AnnotationTitle: "report.dsse.json"}))
		ann[AnnotationSigner] = keyID
	}
	res, err := artifact.PushArtifact(ctx, store, registry.Ref{Repository: ref.Repository}, artifact.ArtifactType("report"), config, layers, &subject, ann, artifact.Options{})
	if err != nil {
		return v1.Descriptor{}, err
	}
	return res.Manifest, nil
}

// ReadReport reads a gate report artifact back.
func ReadReport(ctx context.Context, store registry.Store, repo string, d v1.Hash) (*Report, error) {
	a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: d})
	if err != nil {
		return nil, err
	}
	if a.Kind() != "report" || a.Manifest.Config.MediaType != MediaTypeReport {
		return nil, errkind.New(errkind.BadInput, "%s@%s is not a gate report", repo, d)
	}
	raw, err := artifact.ReadBlob(ctx, store, repo, a.Manifest.Config, 64<<20)
	if err != nil {
		return nil, err
	}
	var rep Report
	if err := json.Unmarshal(raw, &rep); err != nil {
		return nil, errkind.New(errkind.Integrity, "gate report %s is not valid JSON: %v", d, err)
	}
	return &rep, nil
}

// MediaTypeShard is the config of a holdout shard result artifact.
const MediaTypeShard types.MediaType = "application/vnd.modelgate.shard.v1+json"

// AnnotationShard says which shard ("I/N", 1-based) an artifact holds.
const AnnotationShard = "dev.modelgate.shard"

// PushShard stores a shard result as an artifact whose subject is the
// candidate (a report of type "gate-shard").
func PushShard(ctx context.Context, store registry.Store, repo string, r *ShardResult) (v1.Descriptor, error) {
	cd, err := registry.ParseDigest(r.Candidate)
	if err != nil {
		return v1.Descriptor{}, err
	}
	_, subject, err := store.Manifest(ctx, repo, cd)
	if err != nil {
		return v1.Descriptor{}, err
	}
	subject.Annotations, subject.ArtifactType = nil, ""
	raw, err := json.Marshal(r)
	if err != nil {
		return v1.Descriptor{}, err
	}
	ann := map[string]string{
		AnnotationReportType: "gate-shard",
		AnnotationTarget:     r.Target,
		AnnotationShard:      fmt.Sprintf("%d/%d", r.Shard+1, r.Of),
		AnnotationPolicy:     r.Policy,
		AnnotationHoldout:    r.Holdout,
		AnnotationBaseline:   r.Baseline,
	}
	res, err := artifact.PushArtifact(ctx, store, registry.Ref{Repository: repo}, artifact.ArtifactType("report"),
		artifact.NewBlob(MediaTypeShard, raw, nil), nil, &subject, ann, artifact.Options{})
	if err != nil {
		return v1.Descriptor{}, err
	}
	return res.Manifest, nil
}

// FindShards returns the shard results stored for a candidate that were
// made for this target, baseline, holdout and policy (by digest).
func FindShards(ctx context.Context, store registry.Store, repo string, candidate v1.Hash, target, baseline, holdout, pol string) ([]*ShardResult, error) {
	refs, err := store.Referrers(ctx, repo, candidate, artifact.ArtifactType("report"))
	if err != nil {
		return nil, err
	}
	var out []*ShardResult
	for _, d := range refs {
		a := d.Annotations
		if a[AnnotationReportType] != "gate-shard" || a[AnnotationTarget] != target || a[AnnotationPolicy] != pol ||
			a[AnnotationHoldout] != holdout || a[AnnotationBaseline] != baseline {
			continue
		}
		art, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: d.Digest})
		if err != nil {
			return nil, err
		}
		raw, err := artifact.ReadBlob(ctx, store, repo, art.Manifest.Config, 256<<20)
		if err != nil {
			return nil, err
		}
		var r ShardResult
		if err := json.Unmarshal(raw, &r); err != nil {
			return nil, errkind.New(errkind.Integrity, "shard result %s: %v", d.Digest, err)
		}
		out = append(out, &r)
	}
	return out, nil
}

// ShardWait says how WaitShards waits.
type ShardWait struct {
	// Timeout is how long to wait for a complete set in all.
	Timeout time.Duration
	// Poll is the pause between two listings (default 10 s).
	Poll time.Duration
	// Progress, when set, hears each listing's count: have of n shards
	// (n 0 while none is stored).
	Progress func(have, of int)
}

// WaitShards waits until the shard results stored for these inputs (as
// FindShards matches them) make a complete set — every shard 1..N of one
// N — listing the candidate's referrers every w.Poll, and reading no
// shard's content. It returns nil once the set is complete, and an
// errkind.BadInput error naming the missing shards when w.Timeout passes
// first (missing input, not a failed gate).
func WaitShards(ctx context.Context, store registry.Store, repo string, candidate v1.Hash, target, baseline, holdout, pol string, w ShardWait) error {
	poll := w.Poll
	if poll <= 0 {
		poll = 10 * time.Second
	}
	deadline := time.NewTimer(w.Timeout)
	defer deadline.Stop()
	for {
		refs, err := store.Referrers(ctx, repo, candidate, artifact.ArtifactType("report"))
		if err != nil {
			return err
		}
		have := map[int]bool{}
		of := 0
		for _, d := range refs {
			a := d.Annotations
			if a[AnnotationReportType] != "gate-shard" || a[AnnotationTarget] != target || a[AnnotationPolicy] != pol ||
				a[AnnotationHoldout] != holdout || a[AnnotationBaseline] != baseline {
				continue
			}
			var i, n int
			if _, err := fmt.Sscanf(a[AnnotationShard], "%d/%d", &i, &n); err != nil || i < 1 || i > n {
				continue
			}
			if of == 0 {
				of = n
			}
			if n == of {
				have[i] = true
			}
		}
		if w.Progress != nil {
			w.Progress(len(have), of)
		}
		if of > 0 && len(have) == of {
			return nil
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-deadline.C:
			var missing []string
			for i := 1; i <= of; i++ {
				if !have[i] {
					missing = append(missing, fmt.Sprintf("%d/%d", i, of))
				}
			}
			if of == 0 {
				return errkind.New(errkind.BadInput, "no shard result was stored within %s", w.Timeout)
			}
			return errkind.New(errkind.BadInput, "shard results still missing after %s: %v", w.Timeout, missing)
		case <-time.After(poll):
		}
	}
}
