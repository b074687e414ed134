package main

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"text/tabwriter"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policyscaffold"
	"github.com/modelgate/modelgate/internal/registry"
)

// addPolicyScaffold adds `policy draft` and `policy check` under the root's
// `policy` command, making that command when no other file has.
func addPolicyScaffold(root *cobra.Command, g *globals) {
	var parent *cobra.Command
	for _, c := range root.Commands() {
		if c.Name() == "policy" {
			parent = c
		}
	}
	if parent == nil {
		parent = &cobra.Command{
			Use:   "policy",
			Short: "Draft and check policies",
			Long: `policy draft writes a commented starting policy for a tag from the store;
policy check checks a policy against the store without gating.`,
		}
		root.AddCommand(parent)
	}
	parent.AddCommand(newPolicyDraftCmd(g), newPolicyCheckCmd(g))
}

type policyDraftOptions struct {
	From      string
	Holdout   string
	Approvers []string
	Required  int
	Headroom  float64
	Out       string
}

func newPolicyDraftCmd(g *globals) *cobra.Command {
	o := &policyDraftOptions{}
	cmd := &cobra.Command{
		Use:   "draft NAME:TAG [--out FILE]",
		Short: "Write a commented starting policy for a tag, measured from the store",
		Long: `policy draft writes a YAML policy for the tag NAME:TAG from what the store
holds: the kind of model the tag serves (or, before a first release, the
model --from names), a holdout (--holdout, else the store's holdout — with
labels for a scorer — preferring one whose name starts like the tag's),
budgets of bytes and parameters measured on that model plus --headroom, a
scorer's encoder tag when the tag its spec names still points at its
encoder, and the approvers' public keys (--approver NAME=FILE, repeatable)
with their key ids. Every value carries a comment; check the file with
policy check before the first gate. Writes to stdout unless --out.`,
		Args: exactArgs(1, "NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runPolicyDraft(cmd.Context(), g, o, args[0])
		},
	}
	f := cmd.Flags()
	f.StringVar(&o.From, "from", "", "the model to measure when NAME:TAG points at nothing yet (NAME:TAG or NAME@DIGEST)")
	f.StringVar(&o.Holdout, "holdout", "", "the holdout artifact, NAME:TAG or NAME@DIGEST (default: found in the store)")
	f.StringArrayVar(&o.Approvers, "approver", nil, "NAME=PUBLIC_KEY_FILE of an approver (repeatable; keygen writes the key)")
	f.IntVar(&o.Required, "required", -1, "approvals required (default: all approvers, at most 2)")
	// 25% by default: our own choice, room for a retrained model to grow
	// a little before the budget needs a policy change.
	f.Float64Var(&o.Headroom, "headroom", 0.25, "headroom over the measured bytes and parameters, a fraction")
	f.StringVar(&o.Out, "out", "", "write the policy to this file (refused if it exists) instead of stdout")
	return cmd
}

func runPolicyDraft(ctx context.Context, g *globals, o *policyDraftOptions, target string) error {
	t, err := registry.ParseRef(target, false)
	if err != nil {
		return err
	}
	if t.Tag == "" || t.HasDigest() {
		return usageErr("policy draft needs NAME:TAG, got %q", target)
	}
	opts := policyscaffold.DraftOptions{Target: t, Holdout: o.Holdout, Required: o.Required, Headroom: o.Headroom}
	if o.From != "" {
		f, err := parseRef(o.From)
		if err != nil {
			return err
		}
		opts.From = &f
	}
	base := "."
	if o.Out != "" {
		if _, err := os.Lstat(o.Out); err == nil {
			return errkind.New(errkind.Conflict, "%s exists: policy draft does not overwrite a policy", o.Out)
		}
		base = filepath.Dir(o.Out)
	}
	for _, a := range o.Approvers {
		name, file, ok := strings.Cut(a, "=")
		if !ok || name == "" || file == "" {
			return usageErr("--approver %q: want NAME=PUBLIC_KEY_FILE", a)
		}
		rel := file
		if abs, err := filepath.Abs(file); err == nil {
			if b, err := filepath.Abs(base); err == nil {
				if r, err := filepath.Rel(b, abs); err == nil {
					rel = filepath.ToSlash(r)
				}
			}
		}
		opts.Approvers = append(opts.Approvers, policyscaffold.Approver{Name: name, KeyFile: rel, Path: file})
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	res, err := policyscaffold.Draft(ctx, store, opts)
	if err != nil {
		return err
	}
	if o.Out != "" {
		f, err := os.OpenFile(o.Out, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o644)
		if err != nil {
			return errkind.New(errkind.BadInput, "--out: %v", err)
		}
		if _, err := f.Write(res.Policy); err != nil {
			f.Close()
			os.Remove(o.Out)
			return err
		}
		if err := f.Close(); err != nil {
			return err
		}
	}
	if g.JSON {
		out := struct {
			*policyscaffold.DraftResult
			Out    string `json:"out,omitempty"`
			Policy string `json:"policy"`
		}{res, o.Out, string(res.Policy)}
		return g.printJSON(out)
	}
	g.logf("drafted a policy for %s (%s) from %s: holdout %s, maxBytes %d, maxParams %d, %d approver(s)",
		res.Target, res.Kind, res.Measured, res.Holdout, res.MaxBytes, res.MaxParams, res.Approvers)
	if o.Out != "" {
		_, err := fmt.Fprintln(g.Stdout, o.Out)
		return err
	}
	_, err = g.Stdout.Write(res.Policy)
	return err
}

type policyCheckOptions struct {
	Target string
}

func newPolicyCheckCmd(g *globals) *cobra.Command {
	o := &policyCheckOptions{}
	cmd := &cobra.Command{
		Use:   "check FILE [--to NAME:TAG]",
		Short: "Check a policy against the store without gating",
		Long: `policy check reads a policy as the gate does (schema, references, key files
readable and well formed) and checks each rule (or only --to's) against the
store without running any model: the tag serves a model of the rule's kind,
the holdout exists and, for a scorer, has labels, the encoder tag exists,
thresholds are coherent (none a model predicting the base rate passes, a
baseline within its own budget, approvals that can be given). Then it lists
every setting of the rule with the value in force and the default it
replaces. Exit 0 when usable (warnings printed), 2 when the policy cannot be
read or a finding fails.`,
		Args: exactArgs(1, "FILE"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runPolicyCheck(cmd.Context(), g, o, args[0])
		},
	}
	cmd.Flags().StringVar(&o.Target, "to", "", "check only the rule for this target tag")
	return cmd
}

func runPolicyCheck(ctx context.Context, g *globals, o *policyCheckOptions, path string) error {
	store, err := g.openStore()
	if err != nil {
		return err
	}
	rep, err := policyscaffold.Check(ctx, store, path, o.Target)
	if err != nil {
		return err
	}
	var fail error
	if rep.Failed > 0 {
		fail = errkind.New(errkind.BadInput, "policy %s: %d finding(s) fail", path, rep.Failed)
	}
	if g.JSON {
		if err := g.printJSON(rep); err != nil {
			return err
		}
		return fail
	}
	w := tabwriter.NewWriter(g.Stdout, 0, 4, 2, ' ', 0)
	fmt.Fprintf(w, "policy %s (%s), %s\n", rep.Name, rep.Policy, rep.Digest)
	for _, r := range rep.Rules {
		fmt.Fprintf(w, "\nrule %s (%s)\n", r.Target, r.Kind)
		for _, f := range r.Findings {
			fmt.Fprintf(w, "  %s\t%s\n", strings.ToUpper(f.Status), f.Message)
		}
		fmt.Fprintf(w, "\n  SETTING\tVALUE\tFROM\tDEFAULT\n")
		for _, s := range r.Settings {
			def := "-"
			if s.Default != nil {
				def = policyscaffold.FormatValue(s.Default)
			}
			fmt.Fprintf(w, "  %s\t%s\t%s\t%s\n", s.Path, policyscaffold.FormatValue(s.Value), s.Source, def)
		}
	}
	fmt.Fprintf(w, "\nretention\n")
	for _, f := range rep.Retention {
		fmt.Fprintf(w, "  %s\t%s\n", strings.ToUpper(f.Status), f.Message)
	}
	if err := w.Flush(); err != nil {
		return err
	}
	return fail
}
