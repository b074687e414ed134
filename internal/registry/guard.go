package registry

import (
	"context"
	"errors"
	"fmt"
	"strings"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Reserved tag prefixes. A tag starting with one of them is never written
// by Tag, whoever calls it:
//   - ReleaseHeadPrefix: "release-prod" is the head pointer of the release
//     log of "prod" (it names the newest release record). Head pointers
//     move only by SwapTag, from the release path.
//   - ReferrerTagPrefix: the OCI distribution spec's referrers tag schema
//     ("sha256-<digest>") and the registry store's own bookkeeping tags.
const (
	ReleaseHeadPrefix = "release-"
	ReferrerTagPrefix = "sha256-"
)

// ErrGuarded: a plain write to a tag that has a release log. Such a tag
// moves only through promote and rollback (compare-and-swap, with a
// release record).
var ErrGuarded = errors.New("the tag has a release log")

// HeadTag returns the name of the head pointer of tag's release log.
func HeadTag(tag string) string { return ReleaseHeadPrefix + tag }

// IsReservedTag reports whether tag starts with a reserved prefix.
func IsReservedTag(tag string) bool {
	return strings.HasPrefix(tag, ReleaseHeadPrefix) || strings.HasPrefix(tag, ReferrerTagPrefix)
}

// CheckTagName refuses, with errkind.BadInput, a tag that Tag may not
// write: an invalid one, or one with a reserved prefix.
func CheckTagName(tag string) error {
	if err := ValidateTag(tag); err != nil {
		return err
	}
	switch {
	case strings.HasPrefix(tag, ReleaseHeadPrefix):
		return errkind.New(errkind.BadInput, "tag %q is reserved: tags starting with %q are the head pointers of release logs, which only promote and rollback move", tag, ReleaseHeadPrefix)
	case strings.HasPrefix(tag, ReferrerTagPrefix):
		return errkind.New(errkind.BadInput, "tag %q is reserved: tags starting with %q belong to the OCI referrers tag schema and the store's own bookkeeping", tag, ReferrerTagPrefix)
	}
	return nil
}

// checkSwapName refuses, for SwapTag, the tags no caller may write:
// ReferrerTagPrefix. Head pointers are written by SwapTag.
func checkSwapName(tag string) error {
	if strings.HasPrefix(tag, ReferrerTagPrefix) {
		return CheckTagName(tag)
	}
	return nil
}

// guardedError is the refusal of a plain write to repo:tag, which has a
// release log.
func guardedError(repo, tag string) error {
	return errkind.New(errkind.Unauthorized, "%s:%s has a release log, so only `modelgate promote` (through the gate and its approvals) and `modelgate rollback` move it; push to another tag and promote that: %w", repo, tag, ErrGuarded)
}

// CheckTagWrite is the rule every store's Tag applies before a plain
// write of repo:tag: the name must not be reserved (errkind.BadInput) and
// the tag must have no release log (ErrGuarded, errkind.Unauthorized).
// Callers that write blobs before the tag (push) run it first too, so a
// refused push leaves the store as it was. It costs one Resolve.
func CheckTagWrite(ctx context.Context, s Store, repo, tag string) error {
	if err := CheckTagName(tag); err != nil {
		return err
	}
	if ValidateTag(HeadTag(tag)) != nil {
		return nil // too long to ever have a release log
	}
	_, err := s.Resolve(ctx, repo, HeadTag(tag))
	switch {
	case err == nil:
		return guardedError(repo, tag)
	case errors.Is(err, ErrNotFound):
		return nil
	default:
		return fmt.Errorf("checking whether %s:%s has a release log: %w", repo, tag, err)
	}
}
