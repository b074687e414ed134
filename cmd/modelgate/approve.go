package main

import (
	"context"
	"fmt"
	"strings"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

type approveOptions struct {
	To      string
	Policy  string
	Key     string
	Comment string
}

func (o *approveOptions) AddFlags(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&o.To, "to", "", "target tag NAME:TAG (required)")
	f.StringVar(&o.Policy, "policy", "", "policy file with a rule for the target; default: the policy bound to the target (a different file is refused)")
	f.StringVar(&o.Key, "key", "", "your private key, from keygen (required): env:VAR (PEM text in $VAR), file:PATH, PATH, or - (standard input)")
	f.StringVar(&o.Comment, "comment", "", "free text stored in the approval")
}

func newApproveCmd(g *globals) *cobra.Command {
	o := &approveOptions{}
	cmd := &cobra.Command{
		Use:   "approve CANDIDATE --to NAME:TAG --key FILE [--policy FILE]",
		Short: "Sign an approval for a gated candidate to go to a tag",
		Long: `approve signs, with your key, a statement that CANDIDATE may go to the target
tag under the policy, naming the passing gate report you approve (the newest
one bound to the tag's current target, the policy's holdout, the policy and
this modelgate version). It refuses when there is no such report. The
approval is a DSSE envelope around an in-toto statement, stored as an
artifact whose subject is the candidate. The policy is the one bound to the
target tag (--policy, when given, must be that policy).

It prints the verdict of the report it signs and every warning in it (the
approval says you saw them).

Exit codes: 0 stored; 1 the gate failed; 2 bad input; 3 the gate report is
for another baseline (the tag moved: gate again); 4 no gate report, or
--policy is not the bound policy.`,
		Args: exactArgs(1, "CANDIDATE"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runApprove(cmd.Context(), g, o, args[0])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

// releaseTarget parses a candidate and a target in the same repository and
// resolves the candidate to its digest.
func releaseTarget(ctx context.Context, store registry.Store, candStr, to string) (registry.Ref, registry.Ref, error) {
	target, err := registry.ParseRef(to, false)
	if err != nil {
		return registry.Ref{}, registry.Ref{}, err
	}
	if target.Tag == "" || target.HasDigest() {
		return registry.Ref{}, registry.Ref{}, usageErr("--to %q: want NAME:TAG", to)
	}
	cand, err := parseRef(candStr)
	if err != nil {
		return registry.Ref{}, registry.Ref{}, err
	}
	if cand.Repository != target.Repository {
		return registry.Ref{}, registry.Ref{}, usageErr("the candidate %s is in repository %s, the target %s in %s: push it to %s first", cand, cand.Repository, target, target.Repository, target.Repository)
	}
	d, err := artifact.Resolve(ctx, store, cand)
	if err != nil {
		return registry.Ref{}, registry.Ref{}, fmt.Errorf("resolving the candidate %s: %w", cand, err)
	}
	cand.Digest = d.Digest
	return cand, target, nil
}

func runApprove(ctx context.Context, g *globals, o *approveOptions, candStr string) error {
	if o.To == "" || o.Key == "" {
		return usageErr("approve needs --to NAME:TAG and --key FILE")
	}
	key, err := release.LoadKeyFrom(o.Key, g.Stdin)
	if err != nil {
		return err
	}
	warnKeyForm(g, o.Key, key)
	given, err := loadOptionalPolicy(o.Policy)
	if err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	cand, target, err := releaseTarget(ctx, store, candStr, o.To)
	if err != nil {
		return err
	}
	pol, _, err := release.PolicyFor(ctx, store, target, given, "approve")
	if err != nil {
		return err
	}
	rule, err := pol.Rule(target.String())
	if err != nil {
		return err
	}
	trusted, err := release.TrustedKeys(rule.Approvals.Approvers)
	if err != nil {
		return err
	}
	listed := false
	for _, k := range trusted {
		if string(k.Public) == string(key.Public) {
			listed = true
		}
	}
	key.NameFrom(trusted) // the approver's name is the policy's for that key
	rep, err := release.ApproveCheck(ctx, store, cand.Digest, target, pol)
	if err != nil {
		return err
	}
	rd, err := registry.ParseDigest(rep.Digest)
	if err != nil {
		return err
	}
	// What is being signed: the report's verdict and every warning in it.
	full, err := checks.ReadReport(ctx, store, target.Repository, rd)
	if err != nil {
		return fmt.Errorf("reading the gate report %s: %w", rd, err)
	}
	warnings := reportWarnings(full)
	desc, err := release.Approve(ctx, store, release.ApproveRequest{Candidate: cand.Digest, Target: target,
		PolicyDigest: pol.Digest(), Report: rd, Key: key, Comment: o.Comment})
	if err != nil {
		return err
	}
	if !listed {
		g.logf("warning: your key %s is not among the approvers %s lists for %s: this approval will not count unless the policy adds it", key, policySource(o.Policy, target), target)
	}
	if g.JSON {
		return g.printJSON(map[string]any{"approval": desc.Digest.String(), "candidate": cand.Digest.String(), "target": target.String(),
			"gateReport": rep.Digest, "approver": key.Name, "keyId": key.ID, "trusted": listed,
			"verdict": full.Verdict, "warnings": warnings})
	}
	fmt.Fprintf(g.Stdout, "approved %s for %s by %s\napproval:    %s\ngate report: %s (%s)\nverdict:     %s, %d warning(s)\n",
		shortDigest(cand.Digest.String()), target, key, desc.Digest, rep.Digest, rep.Created, strings.ToUpper(full.Verdict), len(warnings))
	for _, w := range warnings {
		fmt.Fprintf(g.Stdout, "  WARN %s\n", w)
	}
	return nil
}

// reportWarnings lists every WARN finding of rep as "CHECK (WHERE): MESSAGE".
func reportWarnings(rep *checks.Report) []string {
	warnings := []string{}
	for _, c := range rep.Checks {
		for _, f := range c.Findings {
			if f.Status != checks.StatusWarn {
				continue
			}
			if f.Where != "" {
				warnings = append(warnings, c.Name+" ("+f.Where+"): "+f.Message)
			} else {
				warnings = append(warnings, c.Name+": "+f.Message)
			}
		}
	}
	return warnings
}

// loadOptionalPolicy loads a --policy file, nil when none was given.
func loadOptionalPolicy(path string) (*policy.Policy, error) {
	if path == "" {
		return nil, nil
	}
	return policy.Load(path)
}

// policySource names where the policy came from, for messages and reports.
func policySource(path string, target registry.Ref) string {
	if path != "" {
		return path
	}
	return "the policy bound to " + target.String()
}
