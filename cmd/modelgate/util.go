package main

import (
	"context"
	"strings"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

func usageErr(format string, args ...any) error {
	return errkind.New(errkind.BadInput, format, args...)
}

// warnKeyForm notes on stderr that a key file is in the deprecated form
// (a name line before the PEM block), which still works.
func warnKeyForm(g *globals, src string, k *release.Key) {
	if k != nil && k.NameLine {
		g.logf("note: %s starts with a %q line, a form modelgate no longer writes (it still reads it); the name now comes from the policy. Rewrite it as plain PKCS#8 PEM: openssl pkey -in OLD -out NEW", strings.TrimPrefix(src, "file:"), "modelgate-key-name:")
	}
}

// policyTagCheck reads the tags the store's bound policies name
// (release.FindPolicyTags) and returns the check to make just before ref's
// tag is written: a named tag may only be written with what it already
// names, or created where it does not exist.
func (g *globals) policyTagCheck(ctx context.Context, store registry.Store) (func(context.Context, registry.Ref, v1.Hash) error, error) {
	pt, err := g.findPolicyTags(ctx, store)
	if err != nil {
		return nil, err
	}
	return func(ctx context.Context, r registry.Ref, m v1.Hash) error {
		return pt.CheckTag(ctx, store, r.Repository, r.Tag, m)
	}, nil
}

// findPolicyTags is release.FindPolicyTags, with a note for each guarded
// tag whose bound policy could not be read (a damaged log: what it names
// is not guarded until log and verify are dealt with).
func (g *globals) findPolicyTags(ctx context.Context, store registry.Store) (*release.PolicyTags, error) {
	pt, err := release.FindPolicyTags(ctx, store)
	if err != nil {
		return nil, err
	}
	for _, u := range pt.Unreadable {
		g.logf("note: %s; the tags it names are not guarded until its log is repaired (see modelgate log and verify)", u)
	}
	return pt, nil
}
