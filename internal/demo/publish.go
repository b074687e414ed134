package demo

import (
	"context"
	"fmt"
	"path/filepath"
	"sort"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
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

// PublishOptions tune PublishWith.
type PublishOptions struct {
	// ReleaseKey signs the first release records; nil leaves them
	// unsigned, by "modelgate demo".
	ReleaseKey *release.Key
	// Policies, by production tag (NAME:TAG), are bound to the tags by
	// their first release records; a tag without one gets a release log
	// with no bound policy (bind one with modelgate policy bind).
	Policies map[string]*policy.Policy
}

// Publish pushes a built scenario into store: encoders first, then the
// scorers that reference them, then the holdouts, and finally releases the
// baseline versions on the production tags, each with a first release
// record (release.Initial) that starts the tag's release log. A production
// tag that already has a release log is left as it is. It checks every
// pushed digest against the one the scenario computed.
func Publish(ctx context.Context, store registry.Store, sc *Scenario, progress func(string)) ([]Published, error) {
	return PublishWith(ctx, store, sc, progress, PublishOptions{})
}

// PublishWith is Publish with options.
func PublishWith(ctx context.Context, store registry.Store, sc *Scenario, progress func(string), opts PublishOptions) ([]Published, error) {
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
		rec, err := release.Initial(ctx, store, release.InitialRequest{Target: ref, To: dg, Key: opts.ReleaseKey,
			User: "modelgate demo", Reason: "first release of the demo's " + name, Policy: opts.Policies[tag]})
		switch {
		case errkind.Is(err, errkind.Conflict):
			cur, rerr := store.Resolve(ctx, ref.Repository, ref.Tag)
			if rerr != nil {
				return nil, rerr
			}
			say("kept   %-34s %s (it already has a release log)", tag, cur.Digest)
			out = append(out, Published{Ref: tag, Digest: cur.Digest.String(), Kind: "tag", Role: "production", Why: "release log kept as it was"})
			continue
		case err != nil:
			return nil, fmt.Errorf("releasing %s on %s: %w", name, tag, err)
		}
		say("released %-32s %s (%s; first release record %s)", tag, d, name, rec)
		out = append(out, Published{Ref: tag, Digest: d, Kind: "tag", Role: "production", Why: "serves " + name + " (first release record)"})
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
