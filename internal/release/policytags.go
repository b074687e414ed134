package release

import (
	"context"
	"errors"
	"fmt"
	"sort"
	"strings"
	"sync"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// NamedTag is a tag a policy names, and as what: "target", "holdout" or
// "freeze encoder tag".
type NamedTag struct {
	Ref  registry.Ref
	Role string
}

// TagsNamed lists the tags pol's rules name: each rule's target, its
// holdout and its freeze encoder tag when given by tag (a reference with
// both a tag and a digest is listed; Ref.HasDigest says it is pinned).
func TagsNamed(pol *policy.Policy) []NamedTag {
	if pol == nil {
		return nil
	}
	var out []NamedTag
	for _, r := range pol.Rules {
		out = append(out, NamedTag{r.Target, "target"})
		if h := r.HoldoutRef; h != nil && h.Tag != "" {
			out = append(out, NamedTag{*h, "holdout"})
		}
		if e := r.Freeze.EncoderTag; e != nil && e.Tag != "" {
			out = append(out, NamedTag{*e, "freeze encoder tag"})
		}
	}
	return out
}

// PolicyTags are the tags the policies bound to a store's guarded tags
// name by tag alone: a rule's holdout and its freeze encoder tag. The gate
// resolves them when it runs and promote checks a report's holdout
// against what the tag points at then, so moving one changes what a
// candidate is judged on: such a tag moves only through a policy change
// (naming another tag or a digest), which needs the approvals of the
// policy in force. A plain push, copy, freeze or untag refuses it
// (TagGuard).
type PolicyTags struct {
	// Named maps "repo:tag" to how the guarded tags' bound policies name
	// it ("the holdout of the policy bound to repo:tag").
	Named map[string][]string
	// Complete is false when the store could not list its repositories
	// (an OCI registry without a catalog): tags named by policies bound in
	// repositories not listed are then not known.
	Complete bool
	// Unreadable lists the guarded tags whose bound policy could not be
	// read because their release log is damaged or incomplete (log and
	// verify say how), each with the error: what they name is not known.
	// A damaged log elsewhere in the store does not stop every push.
	Unreadable []string
}

// FindPolicyTags reads the policy bound to every guarded tag of store
// (every tag with a release log) and collects the tags they name.
func FindPolicyTags(ctx context.Context, store registry.Store) (*PolicyTags, error) {
	pt := &PolicyTags{Named: map[string][]string{}, Complete: true}
	repos, err := store.Repositories(ctx)
	if errors.Is(err, registry.ErrNoCatalog) {
		pt.Complete = false
		return pt, nil
	}
	if err != nil {
		return nil, fmt.Errorf("listing repositories to find the tags bound policies name: %w", err)
	}
	for _, repo := range repos {
		tags, err := store.Tags(ctx, repo)
		if err != nil {
			return nil, fmt.Errorf("listing the tags of %s: %w", repo, err)
		}
		for _, t := range tags {
			g, ok := strings.CutPrefix(t, registry.ReleaseHeadPrefix)
			if !ok || registry.ValidateTag(g) != nil {
				continue
			}
			target := registry.Ref{Repository: repo, Tag: g}
			b, err := BoundPolicy(ctx, store, target)
			if err != nil {
				if errors.Is(err, registry.ErrNotFound) || errkind.Of(err) == errkind.Integrity {
					pt.Unreadable = append(pt.Unreadable, fmt.Sprintf("the policy bound to %s cannot be read: %v", target, err))
					continue
				}
				return nil, fmt.Errorf("reading the policy bound to %s: %w", target, err)
			}
			for _, n := range TagsNamed(b.Policy) {
				if n.Role != "target" && !n.Ref.HasDigest() {
					pt.add(n.Ref.Repository+":"+n.Ref.Tag, fmt.Sprintf("the %s of the policy bound to %s", n.Role, target))
				}
			}
		}
	}
	return pt, nil
}

func (pt *PolicyTags) add(tag, why string) {
	for _, w := range pt.Named[tag] {
		if w == why {
			return
		}
	}
	pt.Named[tag] = append(pt.Named[tag], why)
	sort.Strings(pt.Named[tag])
}

// ErrPolicyTag: a plain write or removal of a tag a bound policy names.
var ErrPolicyTag = errors.New("a bound policy names the tag")

// Check refuses (errkind.Unauthorized, ErrPolicyTag) to move repo:tag to
// target, or to remove it when target is the zero hash, when a bound
// policy names it. now is what the tag points at now (the zero hash when
// it does not exist). Writing the digest it already names is no move;
// creating it where it does not exist is allowed too: no gate can have
// judged anything on a holdout that was not there (a mirror copies it
// after the release log that names it).
func (pt *PolicyTags) Check(repo, tag string, now, target v1.Hash) error {
	whys := pt.Named[repo+":"+tag]
	if len(whys) == 0 || noMove(now, target) {
		return nil
	}
	return errkind.New(errkind.Unauthorized,
		"%s:%s is %s: it moves only through a policy change (name another tag, or pin a digest, in a policy approved as the policy in force requires); push to another tag: %w",
		repo, tag, strings.Join(whys, " and "), ErrPolicyTag)
}

// noMove: writing target where the tag names now moves nothing a gate
// can have judged on.
func noMove(now, target v1.Hash) bool {
	return target != v1.Hash{} && (now == target || now == v1.Hash{})
}

// TagGuard applies PolicyTags.Check to a store's plain tag writes. It
// walks the store's release logs (FindPolicyTags) only for a write that
// would move or remove an existing tag, at most once: pushing a new tag,
// the common case, reads nothing but that tag.
type TagGuard struct {
	Store registry.Store
	// Note, when set, receives each of PolicyTags.Unreadable.
	Note func(string)

	once sync.Once
	pt   *PolicyTags
	err  error
}

// Check refuses, as PolicyTags.Check, to move repo:tag of g.Store to
// target (or remove it: the zero hash).
func (g *TagGuard) Check(ctx context.Context, repo, tag string, target v1.Hash) error {
	var now v1.Hash
	d, err := g.Store.Resolve(ctx, repo, tag)
	switch {
	case err == nil:
		now = d.Digest
	case !errors.Is(err, registry.ErrNotFound):
		return err
	}
	if noMove(now, target) {
		return nil
	}
	g.once.Do(func() {
		g.pt, g.err = FindPolicyTags(ctx, g.Store)
		if g.err == nil && g.Note != nil {
			for _, u := range g.pt.Unreadable {
				g.Note(u)
			}
		}
	})
	if g.err != nil {
		return g.err
	}
	return g.pt.Check(repo, tag, now, target)
}
