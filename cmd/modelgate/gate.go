package main

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
	"github.com/modelgate/modelgate/internal/report"
)

type gateOptions struct {
	To      string
	Policy  string
	Holdout string
	HTML    string
	NoPush  bool
	Threads int
	SignKey string
	Shard   string
	ShardIx string
	Merge   bool
	Wait    time.Duration
	With    []string
}

func (o *gateOptions) AddFlags(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&o.To, "to", "", "target tag NAME:TAG the candidate asks to go to (required)")
	f.StringVar(&o.Policy, "policy", "", "policy file (YAML or JSON) with a rule for the target; default: the policy bound to the target (a different file is refused)")
	f.StringVar(&o.Holdout, "holdout", "", "override the policy's holdout: NAME:TAG or NAME@DIGEST of a holdout artifact")
	f.StringVar(&o.HTML, "html", "", "also write the HTML report to this file")
	f.BoolVar(&o.NoPush, "no-push", false, "do not store the report in the store (it is stored by default, as a referrer of the candidate)")
	f.IntVar(&o.Threads, "threads", 0, "runtime threads for the holdout pass (0: all cores)")
	f.StringVar(&o.Shard, "shard", "", "score only shard I/N of the holdout (1-based) and store its sums for a later --merge; prints the shard result's digest")
	f.StringVar(&o.ShardIx, "shard-index", "", "like --shard, counted from 0: K/N is shard K+1 of N (for a Kubernetes Indexed Job: --shard-index $(JOB_COMPLETION_INDEX)/N)")
	f.DurationVar(&o.Wait, "wait", 0, "with --merge: wait up to this long (e.g. 2h) for every shard result to be stored, checking every 10 s; still missing then: exit 2")
	f.BoolVar(&o.Merge, "merge", false, "run the gate from the stored shard results (of --shard runs with the same inputs) instead of scoring the holdout here")
	f.StringArrayVar(&o.With, "with", nil, "CANDIDATE=NAME:TAG: gate in the world after a release that also moves this tag (repeatable): a scorer's freeze check then reads the encoder that tag will point at")
	f.StringVar(&o.SignKey, "sign-key", "", "sign the stored report with this private key (a CI key a policy lists under reportSigners): env:VAR (PEM text in $VAR), file:PATH, PATH, or - (standard input)")
}

func newGateCmd(g *globals) *cobra.Command {
	o := &gateOptions{}
	cmd := &cobra.Command{
		Use:   "gate CANDIDATE --to NAME:TAG [--policy FILE]",
		Short: "Decide whether a candidate may replace what a tag points at now",
		Long: `gate runs the policy's checks for the target tag — integrity, freeze,
contract, holdout, budget — on the candidate against the tag's current
target (the baseline; none on a first release), computing every number
itself, and prints one line per check and a verdict. The report is stored
in the store as a referrer of the candidate (unless --no-push) and bound to
the candidate, baseline, holdout and policy digests and the tool version.

With --with CANDIDATE=NAME:TAG the gate runs in the world after a release
that also moves that tag (promote --with): a scorer whose policy ties it
to that encoder tag has its freeze check run against CANDIDATE, the
encoder that will be live.

The policy is the one bound to the target tag by its release log; --policy
may name the same policy (then it is checked to be the same) and is
required only for a tag with no release log yet (its first promote binds
it). A --policy that differs from the bound policy is refused, listing what
it changes (see modelgate policy).

With --shard I/N (or --shard-index I-1/N) it scores only shard I of N of
the holdout and stores that shard's sums; --merge then runs the gate from
the N stored shard results, and --wait DURATION makes it wait for them (the
merge can start with the shards). A shard reads no key files the policy
names: on a tag with a bound policy it needs no policy file at all (the
store holds the policy, keys inline), and a --policy whose key files are
not there runs the bound policy.

On a registry or GCS store the holdout is read once per machine: blobs
are kept, verified, in a local cache ($MODELGATE_CACHE, default
$XDG_CACHE_HOME/modelgate; "off" disables it; bounded by
$MODELGATE_CACHE_SIZE, default 4G). A shard fetches only the blocks of
the holdout its rows are in, each checked against the holdout's block
digests; the merge reads none of the holdout's data.

Exit codes: 0 pass, 1 fail, 2 bad input (with --merge: shard results
missing, or made for other inputs), 4 --policy is not the bound policy.`,
		Args: exactArgs(1, "CANDIDATE"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runGate(cmd.Context(), g, o, args[0])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runGate(ctx context.Context, g *globals, o *gateOptions, candStr string) error {
	if o.To == "" {
		return usageErr("gate needs --to NAME:TAG")
	}
	cand, err := parseRef(candStr)
	if err != nil {
		return err
	}
	target, err := registry.ParseRef(o.To, false)
	if err != nil {
		return err
	}
	if target.Tag == "" || target.HasDigest() {
		return usageErr("--to %q: want NAME:TAG", o.To)
	}
	var signer checks.ReportSigner
	var signKey *release.Key
	if o.SignKey != "" {
		if o.NoPush {
			return usageErr("--sign-key signs the stored report: it cannot go with --no-push")
		}
		if signKey, err = release.LoadKeyFrom(o.SignKey, g.Stdin); err != nil {
			return err
		}
		warnKeyForm(g, o.SignKey, signKey)
		signer = release.ReportSigner(signKey)
	}
	var polOpts []policy.LoadOption
	if o.ShardIx != "" {
		if o.Shard != "" {
			return usageErr("--shard and --shard-index: give one")
		}
		var k, n int
		if _, err := fmt.Sscanf(o.ShardIx, "%d/%d", &k, &n); err != nil || n < 1 || k < 0 || k >= n || fmt.Sprintf("%d/%d", k, n) != o.ShardIx {
			return usageErr("--shard-index %q: want K/N with 0 ≤ K < N", o.ShardIx)
		}
		o.Shard = fmt.Sprintf("%d/%d", k+1, n)
	}
	if o.Wait != 0 && !o.Merge {
		return usageErr("--wait goes with --merge")
	}
	if o.Wait < 0 {
		return usageErr("--wait %s: want a positive duration", o.Wait)
	}
	if o.Shard != "" {
		// A shard judges no signature: it runs where only the policy file
		// may be mounted (a ConfigMap), without the approvers' key files.
		polOpts = append(polOpts, policy.SkipKeyFiles())
	}
	var given *policy.Policy
	if o.Policy != "" {
		if given, err = policy.Load(o.Policy, polOpts...); err != nil {
			return err
		}
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	if given != nil && given.Digest() == "" {
		// A shard's policy file without its key files has no identity (its
		// digest covers its keys): the shard runs the bound policy, which
		// the store holds with its keys inline.
		b, err := release.BoundPolicy(ctx, store, target)
		if err != nil {
			return err
		}
		if b.Policy == nil {
			return usageErr("--shard: %s has no bound policy, and %s's key files are not here, so its digest (which covers its keys) cannot be computed: give the shard the key files too, or leave --policy out once the tag's first release has bound a policy", target, o.Policy)
		}
		g.logf("gate: %s's key files are not here, so it cannot be compared with the policy bound to %s; the shard runs the bound policy %s", o.Policy, target, b.Policy.Digest())
		given = nil
	}
	pol, _, err := release.PolicyFor(ctx, store, target, given, "gate")
	if err != nil {
		return err
	}
	rule, err := pol.Rule(target.String())
	if err != nil {
		return err
	}
	if signKey != nil {
		// The signer's name is the policy's for that key.
		if ts, err := release.TrustedKeys(rule.Approvals.ReportSigners); err == nil {
			signKey.NameFrom(ts)
		}
	}
	encTagDigest := ""
	if et := rule.Freeze.EncoderTag; et != nil {
		if d, err := store.Resolve(ctx, et.Repository, et.Tag); err == nil {
			encTagDigest = d.Digest.String()
		}
	}
	for _, w := range o.With {
		candStr, to, ok := strings.Cut(w, "=")
		if !ok || candStr == "" || to == "" {
			return usageErr("--with %q: want CANDIDATE=NAME:TAG", w)
		}
		wc, wt, err := releaseTarget(ctx, store, candStr, to)
		if err != nil {
			return fmt.Errorf("--with %s: %w", w, err)
		}
		if wt.String() == target.String() {
			return usageErr("--with %s names the gate's own target", w)
		}
		if et := rule.Freeze.EncoderTag; et != nil && et.String() == wt.String() {
			encTagDigest = wc.Digest.String()
			g.logf("gate: assuming %s → %s (it moves in the same release)", wt, wc.Digest)
		}
	}
	holdRef := rule.HoldoutRef
	if o.Holdout != "" {
		r, err := registry.ParseRef(o.Holdout, false)
		if err != nil {
			return err
		}
		holdRef = &r
	}
	cfg := checks.FromRule(rule, encTagDigest)
	cfg.Holdout.Threads = o.Threads
	gate := checks.Gate{Store: store, Candidate: cand, Target: target, Holdout: holdRef, Config: cfg,
		Policy:   checks.Policy{Name: pol.Name, Source: policySource(o.Policy, target), Digest: pol.Digest()},
		Progress: g.gateProgress()}
	if o.Shard != "" {
		return runGateShard(ctx, g, o, gate)
	}
	if o.Merge {
		if gate.Shards, err = findShards(ctx, g, store, gate, o.Wait); err != nil {
			return err
		}
	}
	rep, err := checks.Run(ctx, gate)
	if err != nil {
		return err
	}
	var page bytes.Buffer
	if err := report.HTML(&page, rep); err != nil {
		return fmt.Errorf("rendering the HTML report: %w", err)
	}
	if o.HTML != "" {
		if err := os.WriteFile(o.HTML, page.Bytes(), 0o644); err != nil {
			return errkind.Wrap(errkind.BadInput, err)
		}
	}
	reportDigest := ""
	if !o.NoPush {
		d, err := checks.PushSignedReport(ctx, store, rep, page.Bytes(), signer)
		if err != nil {
			return fmt.Errorf("storing the report: %w", err)
		}
		reportDigest = d.Digest.String()
	}
	if g.JSON {
		if err := g.printJSON(map[string]any{"report": rep, "reportDigest": reportDigest}); err != nil {
			return err
		}
	} else {
		if err := report.Terminal(g.Stdout, rep, report.TerminalOptions{Color: g.colorStdout(), ReportDigest: reportDigest, MaxFindings: 8}); err != nil {
			return err
		}
		if o.HTML != "" {
			fmt.Fprintf(g.Stdout, "html:   %s\n", o.HTML)
		}
	}
	if rep.Verdict != checks.VerdictPass {
		return errkind.New(errkind.GateFailed, "gate failed")
	}
	return nil
}

func runGateShard(ctx context.Context, g *globals, o *gateOptions, gate checks.Gate) error {
	var i, n int
	if _, err := fmt.Sscanf(o.Shard, "%d/%d", &i, &n); err != nil || n < 1 || i < 1 || i > n || fmt.Sprintf("%d/%d", i, n) != o.Shard {
		return usageErr("--shard %q: want I/N with 1 ≤ I ≤ N", o.Shard)
	}
	if o.Merge {
		return usageErr("--shard and --merge go in separate runs")
	}
	r, err := checks.RunShard(ctx, gate, i-1, n)
	if err != nil {
		return err
	}
	d, err := checks.PushShard(ctx, gate.Store, gate.Target.Repository, r)
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(map[string]any{"shard": o.Shard, "rows": [2]int64{r.FirstRow, r.EndRow}, "digest": d.Digest.String(), "seconds": r.Seconds})
	}
	g.logf("shard %s: rows %d–%d scored in %.2fs", o.Shard, r.FirstRow, r.EndRow, r.Seconds)
	_, err = fmt.Fprintln(g.Stdout, d.Digest)
	return err
}

// findShards collects the stored shard results made for this gate's inputs.
// With wait > 0 it first waits up to that long for a complete set.
func findShards(ctx context.Context, g *globals, store registry.Store, gate checks.Gate, wait time.Duration) ([]*checks.ShardResult, error) {
	cd, err := artifact.Resolve(ctx, store, gate.Candidate)
	if err != nil {
		return nil, err
	}
	base := ""
	if bd, err := store.Resolve(ctx, gate.Target.Repository, gate.Target.Tag); err == nil {
		base = bd.Digest.String()
	}
	if gate.Holdout == nil {
		return nil, usageErr("--merge: the policy names no holdout")
	}
	hd, err := artifact.Resolve(ctx, store, *gate.Holdout)
	if err != nil {
		return nil, err
	}
	if wait > 0 {
		last := ""
		err := checks.WaitShards(ctx, store, gate.Target.Repository, cd.Digest, gate.Target.String(), base, hd.Digest.String(), gate.Policy.Digest,
			checks.ShardWait{Timeout: wait, Progress: func(have, of int) {
				msg := fmt.Sprintf("--merge: %d of %d shard results stored", have, of)
				if of == 0 {
					msg = "--merge: no shard result stored yet"
				}
				if msg != last {
					g.logf("%s; waiting up to %s", msg, wait)
					last = msg
				}
			}})
		if err != nil {
			return nil, err
		}
	}
	shards, err := checks.FindShards(ctx, store, gate.Target.Repository, cd.Digest, gate.Target.String(), base, hd.Digest.String(), gate.Policy.Digest)
	if err != nil {
		return nil, err
	}
	if len(shards) == 0 {
		return nil, usageErr("--merge: no shard results stored for these inputs (candidate %s, baseline %q, holdout %s, policy %s): run gate --shard I/N first", cd.Digest, base, hd.Digest, gate.Policy.Digest)
	}
	return shards, nil
}
