package release

import (
	"context"
	"fmt"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// MediaTypePolicy is the media type of a policy's canonical form (see
// policy.Policy.Canonical), the one layer of a policy artifact and a layer
// of every release record of a tag with a bound policy.
const MediaTypePolicy types.MediaType = "application/vnd.modelgate.policy.v1+json"

// ArtifactTypePolicy is the artifact type of a stored policy
// (application/vnd.modelgate.policy.v1).
var ArtifactTypePolicy = artifact.ArtifactType("policy")

// maxPolicyBytes bounds a stored policy's canonical form (a policy file is
// at most policy.MaxFileBytes; inlined keys add a little).
const maxPolicyBytes = 2 * policy.MaxFileBytes

// policyBlob is pol's canonical form as a blob.
func policyBlob(pol *policy.Policy) artifact.Blob {
	return artifact.NewBlob(MediaTypePolicy, pol.Canonical(), map[string]string{artifact.AnnotationTitle: "policy.json"})
}

// StorePolicy stores pol's canonical form as a policy artifact in repo
// whose subject is the model subject (the model the tag points at when the
// policy is bound or proposed), and returns its manifest descriptor.
// Storing the same policy about the same model again writes nothing new.
func StorePolicy(ctx context.Context, store registry.Store, repo string, pol *policy.Policy, subject v1.Hash, target string) (v1.Descriptor, error) {
	sd, err := subjectOf(ctx, store, repo, subject)
	if err != nil {
		return v1.Descriptor{}, fmt.Errorf("the model the policy is stored about, %s: %w", subject, err)
	}
	return putArtifact(ctx, store, repo, ArtifactTypePolicy, []artifact.Blob{policyBlob(pol)}, sd,
		map[string]string{AnnotationTarget: target, "dev.modelgate.policy.name": pol.Name})
}

// readPolicyBlob reads and parses a stored canonical policy; a blob that
// is not a canonical policy with digest want is errkind.Integrity.
func readPolicyBlob(ctx context.Context, store registry.Store, repo string, d v1.Descriptor, label string) (*policy.Policy, error) {
	raw, err := artifact.ReadBlob(ctx, store, repo, d, maxPolicyBytes)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", label, err)
	}
	pol, err := policy.Parse(label+".json", raw)
	if err != nil {
		return nil, errkind.New(errkind.Integrity, "%s (%s) is not a valid policy: %v", label, d.Digest, err)
	}
	if pol.Digest() != d.Digest.String() {
		return nil, errkind.New(errkind.Integrity, "%s (%s) is not in canonical form", label, d.Digest)
	}
	pol.Source = label
	return pol, nil
}

// policyLayer returns the record's bound policy layer as a blob already
// in the store (nil when it binds none), for a record that carries the
// same policy on.
func (lr *loadedRecord) policyLayer() *artifact.Blob {
	if lr.policy == nil {
		return nil
	}
	return &artifact.Blob{Desc: *lr.policy}
}

// boundPolicy returns the policy a record binds, nil when it binds none.
func (lr *loadedRecord) boundPolicy(ctx context.Context, store registry.Store, repo string) (*policy.Policy, error) {
	if lr.policy == nil {
		return nil, nil
	}
	return readPolicyBlob(ctx, store, repo, *lr.policy, "the policy bound to "+lr.Record.Target)
}

// Bound is the policy bound to a tag, as its release log says.
type Bound struct {
	// Policy is the bound policy; nil when none is bound.
	Policy *policy.Policy
	// Record is the newest record's digest ("" when the tag has no log).
	Record string
	// Legacy is true when the tag has a release log made before policies
	// were bound to tags (its newest record binds none).
	Legacy bool
}

// BoundPolicy reads the policy bound to target: the one its newest
// release record names. A tag without a release log has none (Record "").
func BoundPolicy(ctx context.Context, store registry.Store, target registry.Ref) (*Bound, error) {
	if err := checkTarget(target); err != nil {
		return nil, err
	}
	s, err := readState(ctx, store, target)
	if err != nil {
		return nil, err
	}
	return boundOf(ctx, store, s)
}

func boundOf(ctx context.Context, store registry.Store, s *state) (*Bound, error) {
	head := s.head
	if s.pending != nil {
		head = s.pending
	}
	if head == nil {
		return &Bound{}, nil
	}
	b := &Bound{Record: head.Digest.String(), Legacy: head.policy == nil}
	pol, err := head.boundPolicy(ctx, store, s.target.Repository)
	if err != nil {
		return nil, err
	}
	b.Policy = pol
	return b, nil
}

// PolicyFor returns the policy that judges a gate, approval or promotion
// to target: the bound policy. given, a policy from a file (nil when
// none), must then be that same policy: any other is refused
// (errkind.Unauthorized, a *Refusal whose problems list what differs). A
// tag with no bound policy is judged by given (its first promote binds
// it); without given that is errkind.BadInput.
func PolicyFor(ctx context.Context, store registry.Store, target registry.Ref, given *policy.Policy, action string) (*policy.Policy, *Bound, error) {
	b, err := BoundPolicy(ctx, store, target)
	if err != nil {
		return nil, nil, err
	}
	pol, err := choosePolicy(b, target, given, action)
	return pol, b, err
}

func choosePolicy(b *Bound, target registry.Ref, given *policy.Policy, action string) (*policy.Policy, error) {
	switch {
	case b.Policy != nil && given == nil:
		return b.Policy, nil
	case b.Policy != nil && given.Digest() == b.Policy.Digest():
		return b.Policy, nil
	case b.Policy != nil:
		return nil, refuse(mismatch(action, target, given, b.Policy))
	case given == nil && b.Legacy:
		return nil, errkind.New(errkind.BadInput, "%s has a release log from before policies were bound to tags: give --policy FILE, and bind it with `modelgate policy bind %s --policy FILE --key KEY`", target, target)
	case given == nil:
		return nil, errkind.New(errkind.BadInput, "%s has no release log and so no bound policy: give --policy FILE (the first promote to %s binds it)", target, target)
	}
	if _, err := given.Rule(target.String()); err != nil {
		return nil, err
	}
	return given, nil
}

// mismatch is the refusal of a policy file that is not the bound policy.
func mismatch(action string, target registry.Ref, given, bound *policy.Policy) *Refusal {
	probs := []string{fmt.Sprintf("%s is not the policy bound to %s (its digest %s, the bound policy's %s); a policy file cannot replace the bound policy. What it changes:",
		given.Source, target, shortHex(given.Digest()), shortHex(bound.Digest()))}
	for _, d := range policy.Diff(bound, given) {
		probs = append(probs, "  "+d)
	}
	probs = append(probs, fmt.Sprintf("leave out --policy to use the bound policy (`modelgate policy show %s`), or propose the change: `modelgate policy approve %s --policy FILE --key KEY` by the approvers the bound policy lists, then `modelgate policy bind %s --policy FILE --key KEY`", target, target, target))
	return &Refusal{Kind: errkind.Unauthorized, Action: action, Problems: probs}
}

// releaserCheck says whether key may sign a move of kind ("promote" or
// "rollback") of the rule's target; "" when it may.
func releaserCheck(rule *policy.Rule, kind string, key *Key) string {
	list := rule.Releasers.Promote
	if kind == KindRollback {
		list = rule.Releasers.Rollback
	}
	if len(list) == 0 {
		return ""
	}
	var names []string
	for _, k := range list {
		names = append(names, k.Name)
		if key != nil && string(k.PublicKey) == string(key.Public) {
			return ""
		}
	}
	if key == nil {
		return fmt.Sprintf("the policy lets only %s sign a %s of %s: sign with --key", strings.Join(names, ", "), kind, rule.Target)
	}
	return fmt.Sprintf("key %s is not one the policy lets sign a %s of %s (it lists %s)", key, kind, rule.Target, strings.Join(names, ", "))
}

// promoterIdentity returns who signs a promotion as the policy knows
// them: the names the rule gives to pub (as a releaser or approver), and
// whether the rule lists pub at all.
func promoterIdentity(rule *policy.Rule, pub []byte) (names map[string]bool, listed bool) {
	names = map[string]bool{}
	for _, list := range [][]policy.Key{rule.Releasers.Promote, rule.Approvals.Approvers} {
		for _, k := range list {
			if string(k.PublicKey) == string(pub) {
				names[k.Name] = true
				listed = true
			}
		}
	}
	return names, listed
}
