package registry

import (
	"regexp"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// Patterns from the OCI distribution spec (spec.md, "Pulling manifests").
// go-containerregistry's name package accepts some names these forbid, so
// modelgate checks them itself.
var (
	repoPattern   = regexp.MustCompile(`^[a-z0-9]+((\.|_|__|-+)[a-z0-9]+)*(\/[a-z0-9]+((\.|_|__|-+)[a-z0-9]+)*)*$`)
	tagPattern    = regexp.MustCompile(`^[a-zA-Z0-9_][a-zA-Z0-9._-]{0,127}$`)
	digestPattern = regexp.MustCompile(`^sha256:[a-f0-9]{64}$`)
)

// MaxRepositoryLength bounds a repository name (common registry limit,
// and the distribution spec advises clients to stay under 255 characters
// for the whole name).
const MaxRepositoryLength = 255

// ValidateRepository checks a repository name against the OCI
// distribution-spec pattern.
func ValidateRepository(repo string) error {
	if repo == "" {
		return errkind.New(errkind.BadInput, "empty repository name")
	}
	if len(repo) > MaxRepositoryLength {
		return errkind.New(errkind.BadInput, "repository name %.40q… is longer than %d characters", repo, MaxRepositoryLength)
	}
	if !repoPattern.MatchString(repo) {
		return errkind.New(errkind.BadInput, "invalid repository name %q: use lower-case letters, digits and single separators . _ __ - between them, / between path components (OCI distribution spec)", repo)
	}
	return nil
}

// ValidateTag checks a tag against the OCI distribution-spec pattern.
func ValidateTag(tag string) error {
	if !tagPattern.MatchString(tag) {
		return errkind.New(errkind.BadInput, "invalid tag %q: 1 to 128 characters of letters, digits, _ . -, not starting with . or - (OCI distribution spec)", tag)
	}
	return nil
}

// ParseDigest parses a "sha256:<64 hex>" digest.
func ParseDigest(s string) (v1.Hash, error) {
	if !digestPattern.MatchString(s) {
		return v1.Hash{}, errkind.New(errkind.BadInput, "invalid digest %q: want sha256: and 64 lower-case hex digits", s)
	}
	h, err := v1.NewHash(s)
	if err != nil {
		return v1.Hash{}, errkind.Wrap(errkind.BadInput, err)
	}
	return h, nil
}

// Ref names an artifact: a repository and a tag or a digest (or both; the
// digest then wins and the tag is informational).
type Ref struct {
	Repository string
	Tag        string
	Digest     v1.Hash // zero when the reference has no digest
}

// HasDigest reports whether the reference pins a digest.
func (r Ref) HasDigest() bool { return r.Digest.Hex != "" }

func (r Ref) String() string {
	s := r.Repository
	if r.Tag != "" {
		s += ":" + r.Tag
	}
	if r.HasDigest() {
		s += "@" + r.Digest.String()
	}
	return s
}

// ParseRef parses NAME:TAG, NAME@DIGEST or NAME:TAG@DIGEST. A bare NAME is
// refused unless allowBare is true (then Tag and Digest are empty).
func ParseRef(s string, allowBare bool) (Ref, error) {
	var r Ref
	rest := s
	if i := strings.IndexByte(rest, '@'); i >= 0 {
		d, err := ParseDigest(rest[i+1:])
		if err != nil {
			return Ref{}, errkind.New(errkind.BadInput, "reference %q: %w", s, err)
		}
		r.Digest = d
		rest = rest[:i]
	}
	if i := strings.LastIndexByte(rest, ':'); i >= 0 && !strings.Contains(rest[i+1:], "/") {
		r.Tag = rest[i+1:]
		rest = rest[:i]
		if err := ValidateTag(r.Tag); err != nil {
			return Ref{}, errkind.New(errkind.BadInput, "reference %q: %w", s, err)
		}
	}
	r.Repository = rest
	if err := ValidateRepository(r.Repository); err != nil {
		return Ref{}, errkind.New(errkind.BadInput, "reference %q: %w", s, err)
	}
	if !allowBare && r.Tag == "" && !r.HasDigest() {
		return Ref{}, errkind.New(errkind.BadInput, "reference %q: want NAME:TAG or NAME@sha256:…", s)
	}
	return r, nil
}
