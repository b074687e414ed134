package release

import (
	"context"
	"errors"
	"fmt"
	"regexp"
	"sort"
	"strconv"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

// MinDigestPrefix is the fewest hex digits a digest prefix may have.
const MinDigestPrefix = 12

var hexPrefix = regexp.MustCompile(`^[a-f0-9]{12,64}$`)

// ResolveRelease turns what on-call types after `rollback --to` into the
// digest released on target it names: a release number from `log` (1 is
// the oldest; "#3" or "3"), a digest or a unique prefix of one (at least
// MinDigestPrefix hex digits, with or without "sha256:") among the
// digests the log released, or a tag (NAME:TAG, or TAG in target's
// repository) whose target is such a digest. It reads the log (a walk of
// its records). A malformed or ambiguous argument, or a number or prefix
// the log does not have, is errkind.BadInput, like a digest never
// released there.
func ResolveRelease(ctx context.Context, store registry.Store, target registry.Ref, arg string) (v1.Hash, error) {
	if d, err := registry.ParseDigest(arg); err == nil {
		return d, nil
	}
	num := strings.TrimPrefix(arg, "#")
	hexArg := strings.TrimPrefix(arg, "sha256:")
	isNumber := num != "" && len(num) < MinDigestPrefix && strings.Trim(num, "0123456789") == ""
	isPrefix := !isNumber && hexPrefix.MatchString(hexArg)
	if !isNumber && !isPrefix {
		ref, err := registry.ParseRef(arg, false)
		if !strings.ContainsAny(arg, ":/@") && registry.ValidateTag(arg) == nil {
			ref, err = registry.Ref{Repository: target.Repository, Tag: arg}, nil
		}
		if err == nil && ref.Tag != "" && !ref.HasDigest() && !strings.HasPrefix(arg, "sha256:") {
			d, err := store.Resolve(ctx, ref.Repository, ref.Tag)
			if err != nil {
				return v1.Hash{}, fmt.Errorf("--to %s: %w", arg, err)
			}
			if ref.Repository != target.Repository {
				return v1.Hash{}, errkind.New(errkind.BadInput, "--to %s is in repository %s, not %s", arg, ref.Repository, target.Repository)
			}
			return d.Digest, nil
		}
		return v1.Hash{}, errkind.New(errkind.BadInput, "--to %q: want a release number from `modelgate log %s`, a digest or a unique prefix of at least %d hex digits, or a tag", arg, target, MinDigestPrefix)
	}
	rep, err := Log(ctx, store, target, LogOptions{})
	if err != nil {
		return v1.Hash{}, err
	}
	if len(rep.Entries) == 0 {
		return v1.Hash{}, errkind.New(errkind.BadInput, "%s has no release log: rollback goes only to versions released with modelgate", target)
	}
	if isNumber {
		n, _ := strconv.Atoi(num)
		for _, e := range rep.Entries {
			if e.Number == n {
				return registry.ParseDigest(e.Record.To)
			}
		}
		return v1.Hash{}, errkind.New(errkind.BadInput, "--to %s: the release log of %s numbers its releases 1 to %d", arg, target, len(rep.Entries))
	}
	released := map[string]bool{}
	for _, e := range rep.Entries {
		released[e.Record.To] = true
		if e.Number == 1 && e.Record.From != "" {
			released[e.Record.From] = true // adopted by the first record
		}
	}
	var match []string
	for d := range released {
		if strings.HasPrefix(strings.TrimPrefix(d, "sha256:"), hexArg) {
			match = append(match, d)
		}
	}
	sort.Strings(match)
	switch len(match) {
	case 1:
		return registry.ParseDigest(match[0])
	case 0:
		return v1.Hash{}, errkind.New(errkind.BadInput, "--to %s: no digest released on %s starts with it (see `modelgate log %s`)", arg, target, target)
	}
	return v1.Hash{}, errkind.New(errkind.BadInput, "--to %s is ambiguous: it starts %s; give more digits", arg, strings.Join(match, " and "))
}

// tagNames maps each of digests (in repo) onto the tags that point at it
// now, as NAME:TAG, leaving out reserved tags. One Tags call and one
// Resolve per tag; a store that cannot list gives no names.
func tagNames(ctx context.Context, store registry.Store, repo string, digests []string) map[string][]string {
	want := map[string]bool{}
	for _, d := range digests {
		if d != "" {
			want[d] = true
		}
	}
	out := map[string][]string{}
	tags, err := store.Tags(ctx, repo)
	if err != nil && !errors.Is(err, registry.ErrNotFound) {
		return out
	}
	for _, t := range tags {
		if registry.IsReservedTag(t) {
			continue
		}
		d, err := store.Resolve(ctx, repo, t)
		if err == nil && want[d.Digest.String()] {
			out[d.Digest.String()] = append(out[d.Digest.String()], repo+":"+t)
		}
	}
	return out
}
