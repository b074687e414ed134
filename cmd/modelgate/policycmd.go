package main

import (
	"context"
	"fmt"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

func newPolicyCmd(g *globals) *cobra.Command {
	cmd := &cobra.Command{
		Use:   "policy",
		Short: "Show, compare, approve and bind the policy bound to a tag",
		Long: `A tag's release log binds the policy that governs it: gate, approve,
promote, rollback and log judge by that policy, stored in the store in
canonical form (sorted JSON, keys inline). The first promote to a tag with
no release log binds the policy it is given; a tag whose log predates bound
policies is bound with "policy bind". Changing the bound policy is itself
a release-log event: the approvers the bound policy lists approve the new
policy ("policy approve"), then someone it lets promote binds it ("policy
bind"), on top of the same newest record.`,
	}
	cmd.AddCommand(newPolicyShowCmd(g), newPolicyDiffCmd(g), newPolicyApproveCmd(g), newPolicyBindCmd(g))
	return cmd
}

func parseTagArg(s string) (registry.Ref, error) {
	t, err := registry.ParseRef(s, false)
	if err != nil {
		return registry.Ref{}, err
	}
	if t.Tag == "" || t.HasDigest() {
		return registry.Ref{}, usageErr("want NAME:TAG, got %q", s)
	}
	return t, nil
}

func newPolicyShowCmd(g *globals) *cobra.Command {
	return &cobra.Command{
		Use:   "show NAME:TAG",
		Short: "Print the policy bound to a tag (canonical JSON) and its digest",
		Long: `show prints the canonical form of the policy bound to the tag, and its
digest on stderr (with --json: both as JSON).

Exit codes: 0 shown; 2 the tag has no bound policy; 5 the stored policy is damaged.`,
		Args: exactArgs(1, "NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			t, err := parseTagArg(args[0])
			if err != nil {
				return err
			}
			store, err := g.openStore()
			if err != nil {
				return err
			}
			b, err := release.BoundPolicy(cmd.Context(), store, t)
			if err != nil {
				return err
			}
			if b.Policy == nil {
				return usageErr("%s has no bound policy%s", t, map[bool]string{true: " (its release log predates bound policies: `modelgate policy bind`)", false: ""}[b.Legacy])
			}
			if g.JSON {
				return g.printJSON(map[string]any{"target": t.String(), "digest": b.Policy.Digest(), "record": b.Record, "policy": rawJSON(b.Policy.Canonical())})
			}
			g.logf("policy %s bound to %s by record %s", b.Policy.Digest(), t, b.Record)
			_, err = fmt.Fprintf(g.Stdout, "%s\n", b.Policy.Canonical())
			return err
		},
	}
}

type rawJSON []byte

func (r rawJSON) MarshalJSON() ([]byte, error) { return r, nil }

func newPolicyDiffCmd(g *globals) *cobra.Command {
	return &cobra.Command{
		Use:   "diff NAME:TAG FILE",
		Short: "List what a policy file changes against the policy bound to a tag",
		Long: `diff lists, one line per setting, what the policy FILE changes against the
policy bound to the tag, by JSON pointer.

Exit codes: 0 the same policy; 1 they differ; 2 bad input.`,
		Args: exactArgs(2, "NAME:TAG FILE"),
		RunE: func(cmd *cobra.Command, args []string) error {
			t, err := parseTagArg(args[0])
			if err != nil {
				return err
			}
			given, err := policy.Load(args[1])
			if err != nil {
				return err
			}
			store, err := g.openStore()
			if err != nil {
				return err
			}
			b, err := release.BoundPolicy(cmd.Context(), store, t)
			if err != nil {
				return err
			}
			if b.Policy == nil {
				return usageErr("%s has no bound policy", t)
			}
			d := policy.Diff(b.Policy, given)
			if g.JSON {
				if err := g.printJSON(map[string]any{"bound": b.Policy.Digest(), "file": given.Digest(), "changes": d}); err != nil {
					return err
				}
			} else {
				if d == nil {
					fmt.Fprintf(g.Stdout, "%s is the policy bound to %s (%s)\n", args[1], t, b.Policy.Digest())
				}
				for _, l := range d {
					fmt.Fprintln(g.Stdout, l)
				}
			}
			if d != nil {
				return errkind.New(errkind.GateFailed, "%s differs from the policy bound to %s", args[1], t)
			}
			return nil
		},
	}
}

type policyChangeOptions struct {
	Policy  string
	Key     string
	Comment string
}

func newPolicyApproveCmd(g *globals) *cobra.Command {
	o := &policyChangeOptions{}
	cmd := &cobra.Command{
		Use:   "approve NAME:TAG --policy FILE --key FILE",
		Short: "Sign an approval that a tag's bound policy may change to FILE",
		Long: `approve signs, with your key, that the policy bound to the tag may change to
the policy FILE, on top of the tag's newest release record (a release in
between needs the approvals again). It prints what changes. Only approvals
by keys the bound policy lists as approvers count, under its required
count, maximum age and self-approval rule.

Exit codes: 0 stored; 2 bad input (no bound policy, the same policy).`,
		Args: exactArgs(1, "NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runPolicyApprove(cmd.Context(), g, o, args[0])
		},
	}
	f := cmd.Flags()
	f.StringVar(&o.Policy, "policy", "", "the proposed policy file (required)")
	f.StringVar(&o.Key, "key", "", "your private key file (required)")
	f.StringVar(&o.Comment, "comment", "", "free text stored in the approval")
	return cmd
}

func runPolicyApprove(ctx context.Context, g *globals, o *policyChangeOptions, tagStr string) error {
	if o.Policy == "" || o.Key == "" {
		return usageErr("policy approve needs --policy FILE and --key FILE")
	}
	t, err := parseTagArg(tagStr)
	if err != nil {
		return err
	}
	key, err := release.LoadKey(o.Key)
	if err != nil {
		return err
	}
	pol, err := policy.Load(o.Policy)
	if err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	d, diff, err := release.ApprovePolicy(ctx, store, release.PolicyChangeRequest{Target: t, Policy: pol, Key: key, Comment: o.Comment})
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(map[string]any{"approval": d.Digest.String(), "target": t.String(), "policy": pol.Digest(), "changes": diff, "approver": key.Name, "keyId": key.ID})
	}
	fmt.Fprintf(g.Stdout, "approved policy %s for %s by %s\napproval: %s\nwhat changes:\n", pol.Digest(), t, key, d.Digest)
	for _, l := range diff {
		fmt.Fprintf(g.Stdout, "  %s\n", l)
	}
	return nil
}

func newPolicyBindCmd(g *globals) *cobra.Command {
	o := &policyChangeOptions{}
	cmd := &cobra.Command{
		Use:   "bind NAME:TAG --policy FILE [--key FILE]",
		Short: "Bind a policy to a tag, or change its bound policy, with a release record",
		Long: `bind writes a policy record to the tag's release log; the tag does not move.

  - A tag whose log was made before policies were bound (an upgrade) can
    only adopt the policy its newest promotion was judged under (the same
    file, by its file digest); a log with no promotion adopts the policy
    given. Bind right after upgrading: until then promote refuses the tag.
  - Changing a bound policy needs the approvals the bound policy asks for
    (modelgate policy approve, over FILE, on top of the tag's newest
    record) and a signer the bound policy lets promote (releasers.promote;
    with self-approval forbidden, a key it lists, whose own approval does
    not count).
A tag with no release log gets its policy from its first promote.

Exit codes: 0 bound (or already bound); 2 bad input; 3 the log moved
meanwhile; 4 approvals missing, a signer the policy does not list, or a
legacy log whose policy is another; 5 the log disagrees with the tag.`,
		Args: exactArgs(1, "NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runPolicyBind(cmd.Context(), g, o, args[0])
		},
	}
	f := cmd.Flags()
	f.StringVar(&o.Policy, "policy", "", "the policy file to bind (required)")
	f.StringVar(&o.Key, "key", "", "private key that signs the policy record")
	f.StringVar(&o.Comment, "reason", "", "free text stored in the record")
	return cmd
}

func runPolicyBind(ctx context.Context, g *globals, o *policyChangeOptions, tagStr string) error {
	if o.Policy == "" {
		return usageErr("policy bind needs --policy FILE")
	}
	t, err := parseTagArg(tagStr)
	if err != nil {
		return err
	}
	key, err := loadOptionalKey(o.Key)
	if err != nil {
		return err
	}
	pol, err := policy.Load(o.Policy)
	if err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	res, err := release.BindPolicy(ctx, store, release.PolicyChangeRequest{Target: t, Policy: pol, Key: key, User: currentUser(), Comment: o.Comment})
	if g.JSON && res != nil {
		// On a refusal the error is added beside the result (finishJSON).
		if perr := g.printJSON(map[string]any{"result": res}); perr != nil {
			return perr
		}
		return err
	}
	if err != nil {
		return err
	}
	w := g.Stdout
	if res.NoOp {
		fmt.Fprintf(w, "%s is already bound to %s: nothing to do\n", t, res.To)
		return nil
	}
	switch {
	case res.Adopted:
		fmt.Fprintf(w, "bound %s to %s, the policy its last promotion was judged under\n", t, res.To)
	case res.First:
		fmt.Fprintf(w, "bound %s to %s (its first policy)\n", t, res.To)
	default:
		fmt.Fprintf(w, "changed the policy of %s: %s → %s\n", t, res.From, res.To)
		for _, l := range res.Diff {
			fmt.Fprintf(w, "  %s\n", l)
		}
		n := 0
		for _, a := range res.Approvals {
			if a.Counted {
				n++
				fmt.Fprintf(w, "approval: %s by %s\n", a.Digest, a.Approver)
			}
		}
		fmt.Fprintf(w, "approvals: %d counted, %d required\n", n, res.Required)
	}
	fmt.Fprintf(w, "record: %s\n", res.Record)
	return nil
}
