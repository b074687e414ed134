package main

import (
	"context"
	"fmt"
	"sort"
	"strings"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/retain"
)

type reclaimOptions struct {
	Policy string
	Apply  bool
}

func (o *reclaimOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Policy, "policy", "", "policy file whose retention section says what may go (required)")
	cmd.Flags().BoolVar(&o.Apply, "apply", false, "remove what is eligible (default: only say what would go)")
}

func newReclaimCmd(g *globals) *cobra.Command {
	o := &reclaimOptions{}
	cmd := &cobra.Command{
		Use:   "reclaim --policy FILE [--apply]",
		Short: "Say (or, with --apply, remove) what the policy's retention lets go",
		Long: `reclaim marks everything the store must keep, from its roots — every tag
not expired, every release log and record, whatever a kept artifact names
or refers to — and lists the rest with the reason it may go (old-candidate,
expired-tag, referrer-of-eligible, unreferenced, unreferenced-blob) and the
bytes that removing it reclaims, grouped by reason. Release records and
everything they reach are never eligible, whatever the policy says; a
repository the policy's retention section does not name keeps everything;
nothing younger than the grace period goes (a push in flight).

By default nothing changes (a dry run). With --apply it removes, in this
order: expired tags (each only if it still points where the mark saw it),
referrers before their subjects, the other manifests, then blobs — each
removal one idempotent store call, so a run stopped at any point leaves a
store that verifies, and a second run finishes the job. On an OCI registry
blob space comes back only through the registry's own garbage collection.`,
		Args: exactArgs(0, "(none)"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runReclaim(cmd.Context(), g, o)
		},
	}
	o.AddFlags(cmd)
	return cmd
}

// reclaimOutput is reclaim's --json document.
type reclaimOutput struct {
	Policy string `json:"policy"`
	// Applied is true with --apply.
	Applied bool         `json:"applied"`
	Plan    *retain.Plan `json:"plan"`
	// Result is what --apply removed; null on a dry run.
	Result *retain.Result `json:"result"`
}

func runReclaim(ctx context.Context, g *globals, o *reclaimOptions) error {
	if o.Policy == "" {
		return usageErr("reclaim needs --policy FILE: its retention section says what may go")
	}
	pol, err := policy.Load(o.Policy)
	if err != nil {
		return err
	}
	store, err := g.openStoreDirect()
	if err != nil {
		return err
	}
	prog := g.progress()
	event := func(phase, name string, done, total int64) {
		if prog != nil {
			prog(artifact.Event{Phase: phase, Name: name, Done: done, Total: total})
		}
	}
	blobs, err := retain.ListBlobs(ctx, store)
	if err != nil {
		return err
	}
	plan, err := retain.Mark(ctx, store, pol, retain.Options{Blobs: blobs,
		Progress: func(phase, name string, done int64) { event(phase, name, done, 0) }})
	if err != nil {
		return err
	}
	out := reclaimOutput{Policy: o.Policy, Applied: o.Apply, Plan: plan}
	if o.Apply && (len(plan.Tags) > 0 || len(plan.Manifests) > 0 || len(plan.Blobs) > 0) {
		res, err := retain.Sweep(ctx, store, plan, retain.SweepOptions{Progress: event})
		if err != nil {
			return err
		}
		out.Result = res
	} else if o.Apply {
		out.Result = &retain.Result{Groups: []retain.Group{}, Skipped: []retain.Skip{}}
	}
	if g.JSON {
		return g.printJSON(out)
	}
	printReclaim(g, &out)
	return nil
}

func printReclaim(g *globals, out *reclaimOutput) {
	w := g.Stdout
	p := out.Plan
	if !p.Retention {
		fmt.Fprintf(w, "%s: policy %s has no retention section: nothing is eligible\n", p.Store, out.Policy)
	} else {
		fmt.Fprintf(w, "%s: retention of policy %s, grace period %s\n", p.Store, out.Policy, p.Grace)
	}
	groups, verb := p.Groups, "would remove"
	if out.Result != nil {
		groups, verb = out.Result.Groups, "removed"
	}
	if len(groups) == 0 {
		fmt.Fprintf(w, "nothing to remove\n")
	} else {
		fmt.Fprintf(w, "%s, by reason:\n", verb)
		for _, gr := range groups {
			fmt.Fprintf(w, "  %-22s %5d tags %7d manifests %7d blobs %12s\n", gr.Reason, gr.Tags, gr.Manifests, gr.Blobs, bytesText(gr.Bytes))
		}
	}
	if r := out.Result; r != nil {
		for _, s := range r.Skipped {
			fmt.Fprintf(w, "  left %s: %s\n", s.Where, s.Why)
		}
		fmt.Fprintf(w, "reclaimed %s: %d tags, %d manifests, %d blobs removed\n", bytesText(r.Bytes), r.Tags, r.Manifests, r.Blobs)
		if r.BlobsUnsupported {
			fmt.Fprintf(w, "this store cannot remove blobs: a registry's own garbage collection reclaims their space\n")
		}
	} else if len(groups) > 0 {
		fmt.Fprintf(w, "would reclaim %s (dry run: --apply removes them)\n", bytesText(p.Bytes))
	}
	var kept []string
	for r, n := range p.Kept.Reasons {
		kept = append(kept, fmt.Sprintf("%s %d", r, n))
	}
	sort.Strings(kept)
	fmt.Fprintf(w, "kept %d manifests and %d blobs (%s)\n", p.Kept.Manifests, p.Kept.Blobs, strings.Join(kept, ", "))
	for _, n := range p.Notes {
		fmt.Fprintf(w, "note: %s\n", n)
	}
}

// bytesText writes n in binary units, exact below a KiB.
func bytesText(n int64) string {
	const unit = 1024
	if n < unit {
		return fmt.Sprintf("%d B", n)
	}
	f, u := float64(n), 0
	for f >= unit && u < 4 {
		f /= unit
		u++
	}
	return fmt.Sprintf("%.1f %ciB", f, "KMGT"[u-1])
}
