package main

import (
	"context"
	"fmt"
	"os"
	"strings"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
)

type promoteOptions struct {
	To       string
	With     []string
	Policies []string
	Key      string
	Reason   string
}

func (o *promoteOptions) AddFlags(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&o.To, "to", "", "target tag NAME:TAG (required)")
	f.StringArrayVar(&o.With, "with", nil, "CANDIDATE=NAME:TAG: move this tag too, in the same release (repeat it; each tag is judged by its bound policy)")
	f.StringArrayVar(&o.Policies, "policy", nil, "policy file with a rule for the target: required for a tag's first release (which binds it), otherwise it must be the bound policy and may be left out; repeat it to name the scorer policies whose rules tie scorers to an encoder tag")
	f.StringVar(&o.Key, "key", "", "private key that signs the release record (without it the record is unsigned and names $USER)")
	f.StringVar(&o.Reason, "reason", "", "free text stored in the release record")
}

func newPromoteCmd(g *globals) *cobra.Command {
	o := &promoteOptions{}
	cmd := &cobra.Command{
		Use:   "promote CANDIDATE --to NAME:TAG [--policy FILE]... [--with CANDIDATE=NAME:TAG]... [--key FILE]",
		Short: "Move a tag to a gated, approved candidate, writing a signed release record",
		Long: `promote moves the target tag to CANDIDATE only if all of these hold, and
otherwise says which failed:
  - a passing gate report bound to this candidate, the tag's current target
    as baseline, the policy's holdout as it resolves now, this policy file's
    digest and this modelgate version (signed by a trusted key when the
    policy lists reportSigners);
  - as many valid, unexpired approvals from distinct keys the policy trusts
    as it requires, for this candidate, tag and policy, each naming such a
    passing report; with self-approval forbidden, an approval by the key
    that signs this promotion (--key) does not count, and --key is needed.
It then writes the release record, moves the tag by compare-and-swap on
the baseline, and advances the release log head (tag release-TAG).
Promoting the tag's current target changes nothing.

Every tag is judged by the policy bound to it (named by its release log);
a --policy with a rule for it that differs is refused with what it
changes. The first release of a tag with no release log binds the --policy
given. When the policy lists releasers.promote, only those keys may sign
(--key); when it forbids self-approval, the signer must be a key it lists,
and approvals by that key or by another key the policy gives the same name
do not count. Approvals and gate reports a rollback ended do not count.

An encoder and the scorers built on its code are coupled. An encoder tag
whose live target a live scorer consumes (a scorer tag with a release log
pointing at a scorer whose spec names that encoder — found by listing the
store, or on a registry without a catalog by the markers its releases left
on the encoder —, or a scorer rule of a --policy file whose
freeze.encoderTag is the encoder tag) does not move alone: promote refuses with exit 4, naming those scorer tags and the
command that moves them together. A scorer whose rule names an encoder
tag must consume the encoder that tag points at (exit 3 otherwise: the
encoder moved since the gate).

--with CANDIDATE=NAME:TAG (repeatable) moves further tags in the same
release: for example a new encoder with the scorers refitted on its code,
each gated with --with naming the encoder's move (gate ... --with
listener-encoder:v2=listener-encoder:prod) so that its freeze check runs
against the encoder that will be live. Every member is judged as above
under the policy bound to its tag (releasers, approvals, self-approval by
the signer) and against the tag's current target; one signed record names every move and is kept
in each tag's log. The tags move scorers first, the encoder last, each by
compare-and-swap: first every release log head is claimed, then every
tag moves. A run that stops part way is completed by the next promote or
rollback of any tag whose log it claimed, and log shows it as
"interrupted". Every member must already have a release log (give a new
tag its first release alone: it binds its policy).

Exit codes: 0 promoted (or already the target); 1 the gate failed; 2 bad
input; 3 the tag moved since the gate ran, or a concurrent promote won;
4 missing approvals or signatures, an encoder moving without the scorers
that consume it, a signer the policy does not list, or a --policy that is
not the bound policy; 5 the release log disagrees with the tag.`,
		Args: exactArgs(1, "CANDIDATE"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runPromote(cmd.Context(), g, o, args[0])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

// currentUser names who acts when nothing is signed.
func currentUser() string {
	if u := os.Getenv("USER"); u != "" {
		return u
	}
	return "unknown"
}

func loadOptionalKey(path string) (*release.Key, error) {
	if path == "" {
		return nil, nil
	}
	return release.LoadKey(path)
}

func runPromote(ctx context.Context, g *globals, o *promoteOptions, candStr string) error {
	if o.To == "" {
		return usageErr("promote needs --to NAME:TAG")
	}
	key, err := loadOptionalKey(o.Key)
	if err != nil {
		return err
	}
	pols, err := loadPolicies(o.Policies)
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
	pol, err := policyFor(ctx, store, pols, target)
	if err != nil {
		return err
	}
	if len(o.With) > 0 {
		return runPromoteUnit(ctx, g, o, store, pols, key, release.UnitMember{Candidate: cand.Digest, CandidateName: candStr, Target: target, Policy: pol})
	}
	res, err := release.Promote(ctx, store, release.PromoteRequest{Candidate: cand.Digest, Target: target, Policy: pol,
		Policies: pols, CandidateName: candStr, Key: key, User: currentUser(), Reason: o.Reason})
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
	if res.Completed != "" {
		fmt.Fprintf(w, "completed an interrupted release first: record %s\n", res.Completed)
	}
	if res.NoOp {
		fmt.Fprintf(w, "%s already points at %s: nothing to do\n", target, res.To)
		return nil
	}
	fmt.Fprintf(w, "promoted %s: %s → %s\n", target, orAbsent(res.From), res.To)
	fmt.Fprintf(w, "gate report: %s\n", res.Report)
	if res.Required > 0 {
		n := 0
		for _, a := range res.Approvals {
			if a.Counted {
				n++
				fmt.Fprintf(w, "approval:    %s by %s\n", a.Digest, a.Approver)
			}
		}
		fmt.Fprintf(w, "approvals:   %d counted, %d required\n", n, res.Required)
	}
	fmt.Fprintf(w, "record:      %s\n", res.Record)
	return nil
}

func orAbsent(d string) string {
	if d == "" {
		return "(absent)"
	}
	return d
}

// loadPolicies loads every policy file named.
func loadPolicies(paths []string) ([]*policy.Policy, error) {
	var out []*policy.Policy
	for _, p := range paths {
		pol, err := policy.Load(p)
		if err != nil {
			return nil, err
		}
		out = append(out, pol)
	}
	return out, nil
}

// policyFor returns the one policy of pols with a rule for target; nil
// when no policy was given, or none of them has a rule for a target with a
// bound policy (the policies are then only consulted for the coupling of
// encoders and scorers, and the tag's bound policy judges it).
func policyFor(ctx context.Context, store registry.Store, pols []*policy.Policy, target registry.Ref) (*policy.Policy, error) {
	if len(pols) == 0 {
		return nil, nil
	}
	var found *policy.Policy
	for _, p := range pols {
		if _, err := p.Rule(target.String()); err != nil {
			continue
		}
		if found != nil {
			return nil, usageErr("both %s and %s have a rule for %s: name one policy per target", found.Source, p.Source, target)
		}
		found = p
	}
	if found == nil {
		if b, err := release.BoundPolicy(ctx, store, target); err == nil && b.Policy != nil {
			return nil, nil
		}
		if len(pols) == 1 {
			_, err := pols[0].Rule(target.String())
			return nil, err
		}
		var names []string
		for _, p := range pols {
			names = append(names, p.Source)
		}
		return nil, usageErr("none of the policies %s has a rule for %s", strings.Join(names, ", "), target)
	}
	return found, nil
}

// parseWith parses --with CANDIDATE=NAME:TAG values into release unit
// members, each with its policy from pols.
func parseWith(ctx context.Context, store registry.Store, with []string, pols []*policy.Policy) ([]release.UnitMember, error) {
	var out []release.UnitMember
	for _, w := range with {
		candStr, to, ok := strings.Cut(w, "=")
		if !ok || candStr == "" || to == "" {
			return nil, usageErr("--with %q: want CANDIDATE=NAME:TAG", w)
		}
		cand, target, err := releaseTarget(ctx, store, candStr, to)
		if err != nil {
			return nil, fmt.Errorf("--with %s: %w", w, err)
		}
		pol, err := policyFor(ctx, store, pols, target)
		if err != nil {
			return nil, err
		}
		out = append(out, release.UnitMember{Candidate: cand.Digest, CandidateName: candStr, Target: target, Policy: pol})
	}
	return out, nil
}

// runPromoteUnit releases first and the --with members as one unit.
func runPromoteUnit(ctx context.Context, g *globals, o *promoteOptions, store registry.Store, pols []*policy.Policy, key *release.Key, first release.UnitMember) error {
	with, err := parseWith(ctx, store, o.With, pols)
	if err != nil {
		return err
	}
	res, err := release.PromoteUnit(ctx, store, release.UnitRequest{Members: append([]release.UnitMember{first}, with...),
		Policies: pols, Key: key, User: currentUser(), Reason: o.Reason})
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
	for _, c := range res.Completed {
		fmt.Fprintf(w, "completed an interrupted release first: record %s\n", c)
	}
	if res.NoOp {
		fmt.Fprintln(w, "every tag already points at its candidate: nothing to do")
		return nil
	}
	fmt.Fprintf(w, "released %d tags together, in this order (one signed record, statement %s):\n", len(res.Members), res.Statement)
	for _, m := range res.Members {
		n := 0
		for _, a := range m.Approvals {
			if a.Counted {
				n++
			}
		}
		fmt.Fprintf(w, "promoted %s: %s → %s\n", m.Target, orAbsent(m.From), m.To)
		fmt.Fprintf(w, "    gate report %s; approvals %d counted, %d required; record %s\n", m.Report, n, m.Required, m.Record)
	}
	return nil
}
