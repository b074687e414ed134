package release

import (
	"context"
	"encoding/json"
	"fmt"
	"sort"
	"strings"

	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// A release that points a scorer tag at a scorer leaves, as a referrer of
// the encoder that scorer reads (in the encoder's repository), a consumer
// marker naming the scorer tag. Dependents reads them to find the scorer
// tags of an encoder on a store that cannot list its repositories (a
// registry without the catalog endpoint). A marker is only a hint: the
// tag it names counts when it still points at a scorer of that encoder,
// so a marker left behind by a later move is harmless. Its content names
// only the tag and the encoder, so writing it again is a no-op.

// ArtifactTypeConsumer marks, as a referrer of an encoder, a scorer tag
// released on a scorer that reads it.
var ArtifactTypeConsumer = artifact.ArtifactType("consumer")

// MediaTypeConsumer is the media type of a consumer marker's one layer.
const MediaTypeConsumer types.MediaType = "application/vnd.modelgate.consumer.v1+json"

// noteConsumer writes the consumer marker of target (a tag being pointed
// at model) when model is a scorer, in every repository among the rule's
// encoder tag's, the spec's encoder name's and target's own that holds
// the encoder. A scorer whose encoder is in none of them gets no marker
// (the catalog still finds it).
func noteConsumer(ctx context.Context, store registry.Store, target registry.Ref, model string, rule *policy.Rule) error {
	md, err := registry.ParseDigest(model)
	if err != nil {
		return err
	}
	mi, err := readModelInfo(ctx, store, target.Repository, md)
	if err != nil {
		return fmt.Errorf("reading %s@%s: %w", target.Repository, model, err)
	}
	if mi.kind != policy.KindScorer || mi.encoder == "" {
		return nil
	}
	enc, err := registry.ParseDigest(mi.encoder)
	if err != nil {
		return nil // integrity checks report a malformed spec
	}
	repos := map[string]bool{target.Repository: true}
	if rule != nil && rule.Freeze.EncoderTag != nil {
		repos[rule.Freeze.EncoderTag.Repository] = true
	}
	if name, _, ok := strings.Cut(mi.encoderName, ":"); ok && name != "" {
		repos[name] = true
	} else if mi.encoderName != "" {
		repos[mi.encoderName] = true
	}
	body, err := json.Marshal(map[string]string{"target": target.String(), "encoder": mi.encoder})
	if err != nil {
		return err
	}
	layer := artifact.NewBlob(MediaTypeConsumer, body, map[string]string{artifact.AnnotationTitle: "consumer.json"})
	names := make([]string, 0, len(repos))
	for r := range repos {
		names = append(names, r)
	}
	sort.Strings(names)
	for _, repo := range names {
		subject, err := subjectOf(ctx, store, repo, enc)
		if err != nil {
			continue // the encoder is not in this repository
		}
		if _, err := putArtifact(ctx, store, repo, ArtifactTypeConsumer, []artifact.Blob{layer}, subject,
			map[string]string{AnnotationTarget: target.String()}); err != nil {
			return fmt.Errorf("noting that %s reads encoder %s: %w", target, mi.encoder, err)
		}
	}
	return nil
}

// consumerTags lists the scorer tags the consumer markers of encoder enc
// in repo name (sorted, without duplicates).
func consumerTags(ctx context.Context, store registry.Store, repo, enc string) ([]registry.Ref, error) {
	ed, err := registry.ParseDigest(enc)
	if err != nil {
		return nil, err
	}
	descs, err := store.Referrers(ctx, repo, ed, ArtifactTypeConsumer)
	if err != nil {
		return nil, fmt.Errorf("listing the scorer tags released on encoder %s: %w", enc, err)
	}
	seen := map[string]bool{}
	var out []registry.Ref
	for _, d := range descs {
		t := d.Annotations[AnnotationTarget]
		if t == "" || seen[t] {
			continue
		}
		r, err := registry.ParseRef(t, false)
		if err != nil || r.Tag == "" || r.HasDigest() {
			continue
		}
		seen[t] = true
		out = append(out, r)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].String() < out[j].String() })
	return out, nil
}
