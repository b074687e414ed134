package release

import (
	"errors"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
)

// TestPolicyTagsCheck: a named tag may be written with the digest it
// names or created where it does not exist; moving it elsewhere or
// removing it is refused (errkind.Unauthorized, ErrPolicyTag); a tag no
// policy names is never refused.
func TestPolicyTagsCheck(t *testing.T) {
	pt := &PolicyTags{Named: map[string][]string{"h:v1": {"the holdout of the policy bound to s:prod"}}, Complete: true}
	a := v1.Hash{Algorithm: "sha256", Hex: "aa"}
	b := v1.Hash{Algorithm: "sha256", Hex: "bb"}
	var none v1.Hash
	for _, c := range []struct {
		repo, tag   string
		now, target v1.Hash
		refused     bool
	}{
		{"h", "v1", a, a, false},        // the same digest again
		{"h", "v1", none, a, false},     // created where it was not
		{"h", "v1", a, b, true},         // moved
		{"h", "v1", a, none, true},      // removed
		{"h", "v2", a, b, false},        // not named
		{"other", "v1", a, none, false}, // another repository
	} {
		err := pt.Check(c.repo, c.tag, c.now, c.target)
		if (err != nil) != c.refused {
			t.Errorf("%s:%s %v -> %v: %v", c.repo, c.tag, c.now, c.target, err)
		}
		if err != nil && (!errors.Is(err, ErrPolicyTag) || errkind.Of(err) != errkind.Unauthorized) {
			t.Errorf("refusal of kind %v: %v", errkind.Of(err), err)
		}
	}
}
