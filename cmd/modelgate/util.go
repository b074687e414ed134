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

// tagGuard returns the check a plain write of a tag of store passes
// (release.TagGuard: a tag a bound policy names as holdout or encoder tag
// does not move), noting each guarded tag whose bound policy cannot be
// read (a damaged log: what it names is not guarded until log and verify
// are dealt with).
func (g *globals) tagGuard(store registry.Store) *release.TagGuard {
	return &release.TagGuard{Store: store, Note: func(u string) {
		g.logf("note: %s; the tags it names are not guarded until its log is repaired (see modelgate log and verify)", u)
	}}
}

// tagCheck is tagGuard as artifact.Options.TagCheck.
func (g *globals) tagCheck(store registry.Store) func(context.Context, registry.Ref, v1.Hash) error {
	guard := g.tagGuard(store)
	return func(ctx context.Context, r registry.Ref, m v1.Hash) error {
		return guard.Check(ctx, r.Repository, r.Tag, m)
	}
}
