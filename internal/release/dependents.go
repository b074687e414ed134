package release

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"sort"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// Dependent is a scorer tag whose live model consumes an encoder's code.
type Dependent struct {
	// Target is the scorer tag, NAME:TAG.
	Target string `json:"target"`
	// Scorer is the digest the tag points at now.
	Scorer string `json:"scorer"`
	// Encoder is the encoder digest that scorer's spec names.
	Encoder string `json:"encoder"`
	// Found says how it was found: "release log" (a tag of the store with
	// a release log) or "policy" (a scorer rule whose freeze.encoderTag is
	// the encoder's tag).
	Found string `json:"found"`
}

// modelInfo is what the coupling rules read of a model: its kind and, for
// a scorer, the encoder digest its spec names.
type modelInfo struct {
	kind    string
	encoder string
	// encoderName is the spec's hint of where the encoder came from
	// (NAME:TAG), "" when none.
	encoderName string
}

// readModelInfo reads repo@d's manifest and, for a scorer, its spec.
func readModelInfo(ctx context.Context, store registry.Store, repo string, d v1.Hash) (modelInfo, error) {
	a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Digest: d})
	if err != nil {
		return modelInfo{}, err
	}
	mi := modelInfo{kind: a.Kind()}
	if mi.kind != policy.KindScorer {
		return mi, nil
	}
	raw, err := artifact.ReadBlob(ctx, store, repo, a.Manifest.Config, 4<<20)
	if err != nil {
		return modelInfo{}, fmt.Errorf("reading the spec of %s@%s: %w", repo, d, err)
	}
	var spec struct {
		Encoder *struct {
			Name   string `json:"name"`
			Digest string `json:"digest"`
		} `json:"encoder"`
	}
	if err := json.Unmarshal(raw, &spec); err != nil {
		return modelInfo{}, errkind.New(errkind.Integrity, "the spec of %s@%s is not JSON: %v", repo, d, err)
	}
	if spec.Encoder != nil {
		mi.encoder, mi.encoderName = spec.Encoder.Digest, spec.Encoder.Name
	}
	return mi, nil
}

// Dependents returns the scorer tags whose live scorer consumes the code
// of encoder digest enc, the live target of the encoder tag encTag. They
// are found three ways: by reverse lineage (every tag of the store that
// has a release log and points at a scorer whose spec names enc), through
// the consumer markers releases leave on enc (see noteConsumer), and
// through the scorer rules of pols whose freeze.encoderTag is encTag
// (their tags count when they point at a scorer of enc). Sorted by
// target.
//
// It costs one Referrers call, one Repositories call, one Tags call per
// repository and a few reads per released tag. On a store that cannot
// list its repositories (registry.ErrNoCatalog) the reverse lineage covers
// only the repositories that encTag and pols name; the markers find the
// scorer tags released since they were written (a scorer tag whose last
// release was made by a modelgate without them is found only through its
// policy, until its next release).
func Dependents(ctx context.Context, store registry.Store, encTag registry.Ref, enc string, pols []*policy.Policy) ([]Dependent, error) {
	found := map[string]Dependent{}
	consider := func(target registry.Ref, how string) error {
		if _, ok := found[target.String()]; ok {
			return nil
		}
		d, err := store.Resolve(ctx, target.Repository, target.Tag)
		if errors.Is(err, registry.ErrNotFound) {
			return nil
		}
		if err != nil {
			return fmt.Errorf("resolving %s: %w", target, err)
		}
		mi, err := readModelInfo(ctx, store, target.Repository, d.Digest)
		if err != nil {
			return fmt.Errorf("reading %s: %w", target, err)
		}
		if mi.kind == policy.KindScorer && mi.encoder == enc {
			found[target.String()] = Dependent{Target: target.String(), Scorer: d.Digest.String(), Encoder: enc, Found: how}
		}
		return nil
	}
	marked, err := consumerTags(ctx, store, encTag.Repository, enc)
	if err != nil {
		return nil, err
	}
	for _, t := range marked {
		if err := consider(t, "release log"); err != nil {
			return nil, err
		}
	}
	repos, err := store.Repositories(ctx)
	if errors.Is(err, registry.ErrNoCatalog) {
		// A registry that does not list its repositories: the markers,
		// and the repositories the encoder tag and the policies name.
		repos = knownRepositories(encTag, pols)
	} else if err != nil {
		return nil, fmt.Errorf("listing repositories to find the scorers of %s: %w", encTag, err)
	}
	for _, repo := range repos {
		tags, err := store.Tags(ctx, repo)
		if errors.Is(err, registry.ErrNotFound) {
			continue
		}
		if err != nil {
			return nil, fmt.Errorf("listing the tags of %s to find the scorers of %s: %w", repo, encTag, err)
		}
		for _, t := range tags {
			name, ok := strings.CutPrefix(t, HeadTagPrefix)
			if !ok || name == "" {
				continue
			}
			if err := consider(registry.Ref{Repository: repo, Tag: name}, "release log"); err != nil {
				return nil, err
			}
		}
	}
	for _, p := range pols {
		if p == nil {
			continue
		}
		for i := range p.Rules {
			r := &p.Rules[i]
			if et := r.Freeze.EncoderTag; r.Kind == policy.KindScorer && et != nil && et.Repository == encTag.Repository && et.Tag == encTag.Tag {
				if err := consider(r.Target, "policy"); err != nil {
					return nil, err
				}
			}
		}
	}
	out := make([]Dependent, 0, len(found))
	for _, d := range found {
		out = append(out, d)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Target < out[j].Target })
	return out, nil
}

// couplingProblems checks a release (the moves, target → candidate, of
// every tag it changes; cur gives each target's digest now) against the
// coupling of encoders and scorers, and returns one line per problem:
//
//   - an encoder tag may move only if every scorer tag that consumes its
//     live target moves in the same release, to a scorer of the new
//     encoder;
//   - a scorer whose rule names an encoder tag must consume the encoder
//     that tag will point at after the release.
//
// candidate for each move and how the unit was named (for the command the
// messages suggest) come from the caller.
func couplingProblems(ctx context.Context, store registry.Store, moves []move, pols []*policy.Policy) ([]problem, error) {
	after := map[string]string{}
	for _, m := range moves {
		after[m.target.String()] = m.to
	}
	var problems []problem
	for _, m := range moves {
		switch m.info.kind {
		case policy.KindEncoder:
			if m.from == "" {
				continue
			}
			deps, err := Dependents(ctx, store, m.target, m.from, pols)
			if err != nil {
				return nil, err
			}
			var alone []Dependent
			for _, d := range deps {
				other, moving := findMove(moves, d.Target)
				switch {
				case !moving:
					alone = append(alone, d)
				case other.info.encoder != m.to:
					problems = append(problems, problem{errkind.Conflict, fmt.Sprintf("%s moves with %s, but its candidate %s consumes encoder %s, not %s",
						d.Target, m.target, other.to, orNone(other.info.encoder), m.to)})
				}
			}
			if len(alone) > 0 {
				problems = append(problems, problem{errkind.Unauthorized, dependentsProblem(m, alone, moves)})
			}
		case policy.KindScorer:
			if m.rule == nil || !m.rule.Freeze.Enabled || m.rule.Freeze.EncoderTag == nil {
				continue
			}
			et := *m.rule.Freeze.EncoderTag
			want, moving := after[et.String()]
			if !moving {
				d, err := store.Resolve(ctx, et.Repository, et.Tag)
				switch {
				case errors.Is(err, registry.ErrNotFound):
				case err != nil:
					return nil, fmt.Errorf("resolving %s, the encoder tag of %s's rule: %w", et, m.target, err)
				default:
					want = d.Digest.String()
				}
			}
			if m.info.encoder != want {
				when := "points at"
				if moving {
					when = "will point at, after this release,"
				}
				problems = append(problems, problem{errkind.Conflict, fmt.Sprintf("%s: the candidate %s consumes encoder %s, but the policy ties it to %s, which %s %s: the scorer would read another code than it was trained on",
					m.target, m.to, orNone(m.info.encoder), et, when, orNone(want))})
			}
		}
	}
	return problems, nil
}

// dependentsProblem says why an encoder cannot move alone and which
// command moves it with its scorers.
func dependentsProblem(m move, alone []Dependent, moves []move) string {
	var names, with []string
	for _, d := range alone {
		names = append(names, fmt.Sprintf("%s (scorer %s)", d.Target, shortHex(d.Scorer)))
		with = append(with, "--with SCORER-CANDIDATE="+d.Target)
	}
	var cmd strings.Builder
	fmt.Fprintf(&cmd, "modelgate promote %s --to %s", m.name, m.target)
	for _, o := range moves {
		if o.target.String() != m.target.String() {
			fmt.Fprintf(&cmd, " --with %s=%s", o.name, o.target)
		}
	}
	for _, w := range with {
		cmd.WriteString(" " + w)
	}
	cmd.WriteString(" --policy … --policy …")
	return fmt.Sprintf("%s's live encoder %s is consumed by %s: moving the encoder alone would feed %s another code than %s trained on. Release them together, each scorer refitted on the new encoder's code and gated with --with %s=%s: `%s`",
		m.target, shortHex(m.from), strings.Join(names, ", "), pronoun(len(alone), "that scorer", "those scorers"), pronoun(len(alone), "it was", "they were"), m.name, m.target, cmd.String())
}

func pronoun(n int, one, many string) string {
	if n == 1 {
		return one
	}
	return many
}

// problem is one reason to refuse, with the kind that decides the exit
// code.
type problem struct {
	kind errkind.Kind
	text string
}

// move is one tag a release changes, with what the coupling rules need.
type move struct {
	target registry.Ref
	name   string // how the candidate was named (for messages)
	from   string // the tag's target now, "" when absent
	to     string // the candidate digest
	info   modelInfo
	rule   *policy.Rule
}

func findMove(moves []move, target string) (move, bool) {
	for _, m := range moves {
		if m.target.String() == target {
			return m, true
		}
	}
	return move{}, false
}

// newMove reads what the coupling rules need of moving target (now at
// from) to cand.
func newMove(ctx context.Context, store registry.Store, target registry.Ref, cand v1.Hash, name, from string, pol *policy.Policy) (move, error) {
	info, err := readModelInfo(ctx, store, target.Repository, cand)
	if err != nil {
		return move{}, fmt.Errorf("the candidate %s: %w", cand, err)
	}
	if name == "" {
		name = target.Repository + "@" + cand.String()
	}
	m := move{target: target, name: name, from: from, to: cand.String(), info: info}
	if pol != nil {
		if r, err := pol.Rule(target.String()); err == nil {
			m.rule = r
		}
	}
	return m, nil
}

// knownRepositories lists the repositories encTag and the rules of pols
// name, sorted.
func knownRepositories(encTag registry.Ref, pols []*policy.Policy) []string {
	seen := map[string]bool{encTag.Repository: true}
	for _, p := range pols {
		if p == nil {
			continue
		}
		for i := range p.Rules {
			seen[p.Rules[i].Target.Repository] = true
		}
	}
	out := make([]string, 0, len(seen))
	for r := range seen {
		out = append(out, r)
	}
	sort.Strings(out)
	return out
}
