package main

import (
	"context"
	"fmt"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

type rollbackOptions struct {
	To     string
	Reason string
	Key    string
	DryRun bool
}

func (o *rollbackOptions) AddFlags(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&o.To, "to", "", "what to go to: a release number from log (#3 or 3), a digest or a unique prefix of at least 12 hex digits, or a tag; it must have been released on the tag before (default: undo the newest release)")
	f.StringVar(&o.Reason, "reason", "", "why (required; stored in the rollback record)")
	f.StringVar(&o.Key, "key", "", "private key that signs the rollback record (without it the record is unsigned and names $USER)")
	f.BoolVar(&o.DryRun, "dry-run", false, "say what would happen, change nothing")
}

func newRollbackCmd(g *globals) *cobra.Command {
	o := &rollbackOptions{}
	cmd := &cobra.Command{
		Use:   "rollback NAME:TAG --reason TEXT [--to N|DIGEST|PREFIX|TAG] [--dry-run]",
		Short: "Move a tag back to an earlier release, with no gate (the emergency path)",
		Long: `rollback moves the tag back, without a gate, to what its newest release record
says undoing it restores: run it again to go back one more release. With
--to it goes to any digest released on that tag before, and nothing else:
name it by its release number in log, by its digest or a unique prefix of
at least 12 hex digits (as log prints them), or by a tag pointing at it.
It reads a constant number of records whatever the length of the log,
moves the tag by compare-and-swap, and writes a rollback record with who
and why. If the tag had been moved outside modelgate, rollback restores the
last released model. When the newest release of the tag moved several tags
together (promote --with: an encoder and its scorers), rollback moves all
of them back, as one record; --to is refused then.
When the tag's bound policy lists releasers.rollback,
only those keys may sign it (--key). A rollback ends the gate reports and
approvals of the models it takes the tag away from: promoting one again
needs a new gate report and new approvals.

Exit codes: 0 done; 2 bad input, nothing earlier, or --to names a digest
never released on the tag; 3 a concurrent change won; 4 a signature is
missing or invalid, or the signer is not one the policy lets roll back;
5 the log is damaged.`,
		Args: exactArgs(1, "NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runRollback(cmd.Context(), g, o, args[0])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runRollback(ctx context.Context, g *globals, o *rollbackOptions, tagStr string) error {
	if o.Reason == "" {
		return usageErr("rollback needs --reason TEXT")
	}
	target, err := registry.ParseRef(tagStr, false)
	if err != nil {
		return err
	}
	if target.Tag == "" || target.HasDigest() {
		return usageErr("rollback takes NAME:TAG, got %q", tagStr)
	}
	req := release.RollbackRequest{Target: target, Reason: o.Reason, User: currentUser(), DryRun: o.DryRun}
	if req.Key, err = loadOptionalKey(o.Key); err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	if o.To != "" {
		d, err := release.ResolveRelease(ctx, store, target, o.To)
		if err != nil {
			return err
		}
		req.To = &d
	}
	res, err := release.Rollback(ctx, store, req)
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(res)
	}
	w := g.Stdout
	if res.Completed != "" {
		fmt.Fprintf(w, "completed an interrupted release first: record %s\n", res.Completed)
	}
	verb := "rolled back"
	if res.DryRun {
		verb = "would roll back"
		if res.Pending != "" {
			fmt.Fprintf(w, "would first complete the interrupted release %s\n", res.Pending)
		}
	}
	if res.External {
		fmt.Fprintf(w, "%s had been moved outside modelgate to %s\n", target, orAbsent(res.From))
	}
	if res.NoOp {
		fmt.Fprintf(w, "%s already points at %s: nothing to do\n", target, res.To)
		return nil
	}
	fmt.Fprintf(w, "%s %s: %s → %s\n", verb, target, orAbsent(res.From), res.To)
	if len(res.With) > 0 {
		fmt.Fprintf(w, "its newest release moved %d tags together; all of them go back, in one record:\n", len(res.With))
		for _, m := range res.With {
			fmt.Fprintf(w, "    %s: %s → %s\n", m.Target, m.From, m.To)
		}
	}
	if res.Record != "" {
		fmt.Fprintf(w, "record: %s\n", res.Record)
	}
	if res.Earlier != "" {
		fmt.Fprintf(w, "a further rollback would restore %s\n", res.Earlier)
	} else {
		fmt.Fprintln(w, "nothing earlier to roll back to after this")
	}
	return nil
}
