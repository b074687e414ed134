package demo

import (
	"context"
	"fmt"
	"path/filepath"
	"sort"

	"modelgate/internal/artifact"
	"modelgate/internal/registry"
)

// Published is one artifact the demo pushed.
type Published struct {
	Ref    string `json:"ref"`
	Digest string `json:"digest"`
	Kind   string `json:"kind"`
	Role   string `json:"role"`
	Fails  string `json:"fails,omitempty"`
	Why    string `json:"why"`
}

// Publish pushes a built scenario into store: encoders first, then the
// scorers that reference them, then the holdouts, and finally points the
// production tags at the baseline versions. It checks every pushed digest
// against the one the scenario computed.
func Publish(ctx context.Context, store registry.Store, sc *Scenario, progress func(string)) ([]Published, error) {
	say := func(format string, args ...any) {
		if progress != nil {
			progress(fmt.Sprintf(format, args...))
		}
	}
	var out []Published
	digests := map[string]string{}
	for _, m := range sc.Models {
		ref, err := registry.ParseRef(m.Tag, false)
		if err != nil {
			return nil, err
		}
		res, err := artifact.PushModelDir(ctx, store, filepath.Join(sc.Dir, m.Path), ref, artifact.Options{})
		if err != nil {
			return nil, fmt.Errorf("pushing %s: %w", m.Name, err)
		}
		if res.Digest != m.Digest {
			return nil, fmt.Errorf("pushing %s: digest %s, the scenario computed %s", m.Name, res.Digest, m.Digest)
		}
		digests[m.Name] = res.Digest
		say("pushed %-34s %s", m.Tag, res.Digest)
		out = append(out, Published{Ref: m.Tag, Digest: res.Digest, Kind: m.Kind, Role: m.Role, Fails: m.Fails, Why: m.Why})
	}
	for _, h := range sc.Holdouts {
		ref, err := registry.ParseRef(h.Tag, false)
		if err != nil {
			return nil, err
		}
		res, err := artifact.PushHoldout(ctx, store, filepath.Join(sc.Dir, h.Path), ref, artifact.Options{})
		if err != nil {
			return nil, fmt.Errorf("pushing holdout %s: %w", h.Tag, err)
		}
		say("pushed %-34s %s (%d rows)", h.Tag, res.Digest, h.Rows)
		out = append(out, Published{Ref: h.Tag, Digest: res.Digest, Kind: "holdout", Role: "holdout for " + h.For + "s",
			Why: fmt.Sprintf("%d listeners held out from training", h.Rows)})
	}
	for _, tag := range sortedKeys(sc.Prod) {
		name := sc.Prod[tag]
		ref, err := registry.ParseRef(tag, false)
		if err != nil {
			return nil, err
		}
		d, ok := digests[name]
		if !ok {
			return nil, fmt.Errorf("production tag %s names %q, which the scenario did not push", tag, name)
		}
		dg, err := registry.ParseDigest(d)
		if err != nil {
			return nil, err
		}
		_, desc, err := store.Manifest(ctx, ref.Repository, dg)
		if err != nil {
			return nil, err
		}
		if err := store.Tag(ctx, ref.Repository, ref.Tag, desc); err != nil {
			return nil, err
		}
		say("tagged %-34s %s (%s)", tag, d, name)
		out = append(out, Published{Ref: tag, Digest: d, Kind: "tag", Role: "production", Why: "serves " + name})
	}
	return out, nil
}

func sortedKeys(m map[string]string) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}
