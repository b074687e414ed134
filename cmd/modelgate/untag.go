package main

import (
	"context"
	"errors"
	"fmt"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
)

type untagOptions struct {
	Expect string
}

// untagResult is untag's --json document.
type untagResult struct {
	// Target is the tag removed, NAME:TAG.
	Target string `json:"target"`
	// Digest is the manifest it pointed at.
	Digest string `json:"digest"`
	// ManifestKept says whether the manifest is still in the store: true
	// unless the store can remove a tag only with its manifest (an OCI
	// registry without tag deletion, such as docker-registry 2.x).
	ManifestKept bool `json:"manifestKept"`
}

func newUntagCmd(g *globals) *cobra.Command {
	o := &untagOptions{}
	cmd := &cobra.Command{
		Use:   "untag NAME:TAG [--expect DIGEST]",
		Short: "Remove a candidate tag (never a released one)",
		Long: `untag removes a tag. The manifest it pointed at stays in the store, with its
reports and approvals, until retention collects it.

It refuses a tag with a release log (one promote has moved: only promote and
rollback move it), the reserved tags (release-*, the head pointers of release
logs; sha256-*, the store's own bookkeeping), and, with --expect, a tag that
no longer points at the digest you name (it moved since you looked). The
removal is conditional on the tag's target in every store, so a tag moved
by someone else between the check and the removal stays.

On an OCI registry that cannot delete a tag by name (docker-registry 2.x:
the distribution API deletes manifests by digest, with every tag naming
them), untag deletes the manifest with its tag when no other tag names it,
and refuses otherwise; the output says when the manifest went too.

Exit codes: 0 removed; 2 bad input (no such tag, a reserved tag, a store
that cannot remove it); 3 the tag points elsewhere than --expect (or moved
meanwhile); 4 the tag has a release log.`,
		Args: exactArgs(1, "NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runUntag(cmd.Context(), g, o, args[0])
		},
	}
	cmd.Flags().StringVar(&o.Expect, "expect", "", "remove the tag only if it points at this digest (sha256:<64 hex>, as show and ls print it)")
	return cmd
}

func runUntag(ctx context.Context, g *globals, o *untagOptions, refStr string) error {
	target, err := registry.ParseRef(refStr, false)
	if err != nil {
		return err
	}
	if target.Tag == "" || target.HasDigest() {
		return usageErr("untag takes NAME:TAG, got %q", refStr)
	}
	if err := registry.CheckTagName(target.Tag); err != nil {
		return err
	}
	var want v1.Hash
	if o.Expect != "" {
		if want, err = registry.ParseDigest(o.Expect); err != nil {
			return fmt.Errorf("--expect: %w", err)
		}
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	del, ok := registry.Ability[registry.Deleter](store)
	if !ok {
		return errkind.New(errkind.BadInput, "store %s cannot remove tags", store)
	}
	if want == (v1.Hash{}) {
		d, err := store.Resolve(ctx, target.Repository, target.Tag)
		if err != nil {
			return err
		}
		want = d.Digest
	}
	if err := g.tagGuard(store).Check(ctx, target.Repository, target.Tag, v1.Hash{}); err != nil {
		return err
	}
	if err := del.DeleteTag(ctx, target.Repository, target.Tag, want); err != nil {
		return err
	}
	res := untagResult{Target: target.String(), Digest: want.String(), ManifestKept: true}
	if _, _, err := store.Manifest(ctx, target.Repository, want); errors.Is(err, registry.ErrNotFound) {
		res.ManifestKept = false
	} else if err != nil {
		return fmt.Errorf("the tag was removed; reading its manifest afterwards: %w", err)
	}
	if g.JSON {
		return g.printJSON(res)
	}
	if res.ManifestKept {
		fmt.Fprintf(g.Stdout, "untagged %s (was %s); the manifest stays in the store until retention collects it\n", res.Target, res.Digest)
	} else {
		fmt.Fprintf(g.Stdout, "untagged %s: the store removes tags only with their manifest, so manifest %s went too (its reports and approvals stay until retention collects them)\n", res.Target, res.Digest)
	}
	return nil
}
