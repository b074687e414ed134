package main

import (
	"context"
	"fmt"
	"io"
	"strings"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

type logOptions struct {
	Policy string
}

func (o *logOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Policy, "policy", "", "cross-check: the tag's bound policy must be this file, and every record signed by a key it lists (approvers or report signers)")
}

func newLogCmd(g *globals) *cobra.Command {
	o := &logOptions{}
	cmd := &cobra.Command{
		Use:   "log NAME:TAG [--policy FILE]",
		Short: "List and verify a tag's release log, newest first",
		Long: `log lists the release records of a tag, newest first, and verifies while
listing: every record's signature, every hash link to the previous record,
that each record starts where the previous one left the tag, the released
index, that rollbacks went only to versions released before, and that the
tag points where the newest record says. It judges every record by the
policy in force at it (the policy the log binds, stored in the store):
the signer against releasers, a promotion's gate report and approvals
(count, keys, self-approval, not ended by a rollback), a policy change's
approvals by the policy it replaced. Anything wrong is reported, never
skipped. --policy is only a cross-check against the bound policy.

Exit codes: 0 verified; 2 bad input; 4 a record the policy in force does
not allow (or, with --policy, a record no key the file lists signed, or a
bound policy other than the file); 5 a broken chain, an edited or missing
record, or a tag moved outside modelgate.`,
		Args: exactArgs(1, "NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runLog(cmd.Context(), g, o, args[0])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runLog(ctx context.Context, g *globals, o *logOptions, tagStr string) error {
	target, err := registry.ParseRef(tagStr, false)
	if err != nil {
		return err
	}
	if target.Tag == "" || target.HasDigest() {
		return usageErr("log takes NAME:TAG, got %q", tagStr)
	}
	var opts release.LogOptions
	if o.Policy != "" {
		pol, err := policy.Load(o.Policy)
		if err != nil {
			return err
		}
		rule, err := pol.Rule(target.String())
		if err != nil {
			return err
		}
		keys, err := release.TrustedKeys(append(append([]policy.Key(nil), rule.Approvals.Approvers...), rule.Approvals.ReportSigners...))
		if err != nil {
			return err
		}
		opts.Trusted = keys
		opts.Policy = pol
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	rep, err := release.Log(ctx, store, target, opts)
	if err != nil {
		return err
	}
	if g.JSON {
		if err := g.printJSON(rep); err != nil {
			return err
		}
	} else {
		printLog(g.Stdout, rep)
	}
	switch rep.Worst() {
	case errkind.Integrity:
		return errkind.New(errkind.Integrity, "the release log of %s does not verify", target)
	case errkind.Unauthorized:
		return errkind.New(errkind.Unauthorized, "the release log of %s has records the policy in force does not allow, or that no trusted key vouches for", target)
	}
	return nil
}

// modelName names a model of a record for people: the tags pointing at it
// now, else repository@short digest.
func modelName(rep *release.LogReport, d string) string {
	if d == "" {
		return "(absent)"
	}
	if names := rep.Names[d]; len(names) > 0 {
		if len(names) > 3 {
			names = append(names[:3:3], fmt.Sprintf("+%d", len(names)-3))
		}
		return strings.Join(names, ", ") + " (" + shortDigest(d) + ")"
	}
	repo, _, _ := strings.Cut(rep.Target, ":")
	return repo + "@" + shortDigest(d)
}

func printLog(w io.Writer, rep *release.LogReport) {
	if rep.NoLog {
		fmt.Fprintf(w, "%s has no release log: it points at %s (%s), was pushed and never promoted or rolled back.\n`modelgate promote` starts its log.\n", rep.Target, orAbsent(rep.Current), modelName(rep, rep.Current))
		return
	}
	fmt.Fprintf(w, "release log of %s: %d record(s), newest first; the tag points at %s\n", rep.Target, len(rep.Entries), orAbsent(rep.Current))
	byWhere := map[string][]release.Finding{}
	for _, f := range rep.Findings {
		byWhere[f.Where] = append(byWhere[f.Where], f)
	}
	for _, e := range rep.Entries {
		r := e.Record
		by, sig := r.By.Name, "unsigned"
		if e.Verified {
			by, sig = r.By.String(), "signature ok"
		}
		fmt.Fprintf(w, "\n#%d  %s  %-8s  %s → %s\n", e.Number, r.Time, r.Kind, modelName(rep, r.From), modelName(rep, r.To))
		fmt.Fprintf(w, "    by %s, %s; record %s\n", by, sig, shortDigest(e.Digest))
		for _, u := range r.Unit {
			if u.Target != r.Target {
				fmt.Fprintf(w, "    in one release with %s: %s → %s\n", u.Target, shortDigest(orAbsent(u.From)), shortDigest(u.To))
			}
		}
		if r.Reason != "" {
			fmt.Fprintf(w, "    reason: %s\n", r.Reason)
		}
		if r.Report != "" {
			fmt.Fprintf(w, "    gate report %s, %d approval(s)\n", shortDigest(r.Report), len(r.Approvals))
		}
		if r.Kind == release.KindPolicy {
			fmt.Fprintf(w, "    policy %s → %s, %d approval(s)\n", shortDigest(orAbsent(r.PolicyDigest)), shortDigest(r.Policy), len(r.Approvals))
		}
		if len(r.Ended) > 0 {
			fmt.Fprintf(w, "    ended %d gate report(s) and approval(s) of the release(s) it undid\n", len(r.Ended))
		}
		for _, f := range byWhere[e.Digest] {
			fmt.Fprintf(w, "    %s: %s\n", strings.ToUpper(f.Severity), f.Message)
		}
		delete(byWhere, e.Digest)
	}
	var rest []release.Finding
	for _, f := range rep.Findings {
		if _, ok := byWhere[f.Where]; ok {
			rest = append(rest, f)
		}
	}
	if len(rest) > 0 {
		fmt.Fprintln(w)
		for _, f := range rest {
			fmt.Fprintf(w, "%s: %s: %s\n", strings.ToUpper(f.Severity), f.Where, f.Message)
		}
	}
	switch rep.Worst() {
	case errkind.Integrity:
		fmt.Fprintln(w, "\nverdict: the release log does NOT verify")
	case errkind.Unauthorized:
		fmt.Fprintln(w, "\nverdict: chain intact, but not every record is allowed by the policy in force (or vouched for by a trusted key)")
	default:
		fmt.Fprintln(w, "\nverdict: every record, signature and link verified; the tag matches the newest record")
	}
}
