package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/demo"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
	"github.com/modelgate/modelgate/policies"
)

type demoOptions struct {
	Work string
	Seed uint64
}

func (o *demoOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Work, "work", "", "where to write the generated model directories and holdouts (it holds the demo's private keys; default: DIR.demo beside a local store DIR, else a folder in the user's data directory named after the store)")
	cmd.Flags().Uint64Var(&o.Seed, "seed", demo.DefaultConfig().Seed, "seed of the generated podcast network")
}

func newDemoCmd(g *globals) *cobra.Command {
	o := &demoOptions{}
	cmd := &cobra.Command{
		Use:   "demo",
		Short: "Build the demo scenario (a fictional podcast network) in the store",
		Long: `demo generates a fictional podcast network — listeners, a few thousand shows,
episodes played per show, and whether a listener subscribed to a promoted
show — fits a listener encoder (PCA, the linear autoencoder's optimum) and
a subscription scorer (logistic regression) on it, and pushes a baseline
and a set of candidates into the store: a better one, a worse one, one
whose vocabulary no longer matches its weight rows, one that leaves its
encoder trainable with a regulariser attached, and one over budget. The
baselines are released on the production tags with first release records.

Then it plays the release story on promo-scorer:prod: keys for two
approvers, a release manager and CI (in the work folder), a copy of
policies/promo-scorer.yaml that trusts them; the better candidate gated
(report signed by CI), approved by two keys and promoted; the bad
candidates refused with their reasons; a rollback; a new encoder version
(listener-encoder:v2) with the scorer refitted on its code: the encoder
alone refused because the live scorer reads its code, both released
together under one record, and rolled back together; and the verified
logs.
On a store where the story already ran, it only shows the log.
Everything is invented data.`,
		Args: exactArgs(0, "(none)"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runDemo(cmd.Context(), g, o)
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runDemo(ctx context.Context, g *globals, o *demoOptions) error {
	start := time.Now()
	work := o.Work
	if work == "" {
		var err error
		if work, err = g.defaultDemoWork(); err != nil {
			return err
		}
	}
	if err := clearWork(work); err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	cfg := demo.DefaultConfig()
	cfg.Seed = o.Seed
	say := func(s string) { g.logf("demo: %s", s) }
	sc, err := demo.Build(work, cfg, say)
	if err != nil {
		return err
	}
	keys, err := demoKeys(filepath.Join(work, "keys"))
	if err != nil {
		return err
	}
	polPath, err := demoPolicy(work, keys)
	if err != nil {
		return err
	}
	bound, err := demoBoundPolicies(work, keys, polPath)
	if err != nil {
		return err
	}
	pub, err := demo.PublishWith(ctx, store, sc, say, demo.PublishOptions{ReleaseKey: keys["rita"], Policies: bound})
	if err != nil {
		return err
	}
	var story bytes.Buffer
	if err := releaseStory(ctx, g, &story, work, sc, keys, polPath); err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(map[string]any{"store": store.String(), "work": work, "artifacts": pub, "scenario": sc,
			"story": story.String(), "seconds": time.Since(start).Seconds()})
	}
	w := g.Stdout
	fmt.Fprintf(w, "Demo scenario: a fictional podcast network (%d shows, %d training listeners), built in %.1fs.\n",
		cfg.Shows, cfg.Train, time.Since(start).Seconds())
	fmt.Fprintf(w, "Store:  %s\nFiles:  %s (model directories, holdouts, scenario.json)\n\n", store, work)
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "REF\tKIND\tDIGEST\tROLE\tBUILT TO FAIL\tWHAT IT IS")
	for _, p := range pub {
		fails := p.Fails
		if fails == "" && p.Role == "candidate" {
			fails = "(passes)"
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\n", p.Ref, p.Kind, shortDigest(p.Digest), p.Role, fails, p.Why)
	}
	tw.Flush()
	fmt.Fprintln(w)
	w.Write(story.Bytes())
	fmt.Fprintf(w, "\nDemo done in %.1fs.\n", time.Since(start).Seconds())
	mg := "modelgate"
	if loc, err := g.storeLocation(); err == nil {
		if d, err := defaultStoreDir(); err != nil || loc != d {
			mg += " --store " + shellQuote(loc)
		}
	}
	ls, verify := mg+" ls", mg+" verify"
	if _, err := store.Repositories(ctx); errors.Is(err, registry.ErrNoCatalog) {
		ls, verify = mg+" ls promo-scorer", mg+" verify promo-scorer listener-encoder promo-holdout"
	}
	fmt.Fprintln(w, "\nTry:")
	fmt.Fprintln(w, "  "+ls)
	fmt.Fprintln(w, "  "+mg+" show promo-scorer:cand-better")
	fmt.Fprintln(w, "  "+mg+" diff promo-scorer:baseline promo-scorer:cand-shuffled-vocab")
	fmt.Fprintln(w, "  "+mg+" score promo-scorer:prod --holdout promo-holdout:v1 --out predictions.csv")
	fmt.Fprintln(w, "  "+verify)
	fmt.Fprintln(w, "  "+mg+" log promo-scorer:prod --policy "+shellQuote(filepath.Join(work, "policies", "promo-scorer.yaml")))
	fmt.Fprintln(w, "  "+mg+" log listener-encoder:prod --policy "+shellQuote(filepath.Join(work, "policies", "listener-encoder.yaml")))
	return nil
}

// defaultDemoWork is the demo's work folder when --work is not given: it
// holds private keys, so it belongs to the store it was made for — beside
// the default store "demo", beside a local store DIR "DIR.demo", and for a
// remote store a folder in the user's data directory named after it.
func (g *globals) defaultDemoWork() (string, error) {
	loc, err := g.storeLocation()
	if err != nil {
		return "", err
	}
	def, err := defaultStoreDir()
	if err != nil {
		return "", err
	}
	switch {
	case loc == def:
		return filepath.Join(filepath.Dir(def), "demo"), nil
	case isLocalLocation(loc):
		dir := filepath.Clean(strings.TrimPrefix(loc, "file://"))
		return dir + ".demo", nil
	}
	sum := sha256.Sum256([]byte(loc))
	return filepath.Join(filepath.Dir(def), "demo-"+hex.EncodeToString(sum[:6])), nil
}

// shellQuote quotes s for a POSIX shell when it needs quoting.
func shellQuote(s string) string {
	if s != "" && strings.Trim(s, "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_./:@=+,") == "" {
		return s
	}
	return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'"
}

// clearWork empties a previous demo folder (one holding scenario.json) and
// refuses to touch any other non-empty folder.
func clearWork(dir string) error {
	es, err := os.ReadDir(dir)
	if os.IsNotExist(err) || (err == nil && len(es) == 0) {
		return nil
	}
	if err != nil {
		return err
	}
	if _, err := os.Stat(filepath.Join(dir, "scenario.json")); err != nil {
		return errkind.New(errkind.BadInput, "--work %s is not empty and is not a previous demo folder (no scenario.json): choose another", dir)
	}
	return os.RemoveAll(dir)
}

// demoPeople are the demo's key holders and what they do in the story.
var demoPeople = []struct{ name, role string }{
	{"ana", "approver"},
	{"ben", "approver"},
	{"rita", "release manager, approver"},
	{"ci", "CI, signs gate reports"},
}

// demoKeys makes the demo's key pairs in dir.
func demoKeys(dir string) (map[string]*release.Key, error) {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return nil, err
	}
	keys := map[string]*release.Key{}
	for _, p := range demoPeople {
		k, err := release.GenerateKey(p.name)
		if err != nil {
			return nil, err
		}
		if _, _, err := release.WriteKeyFiles(filepath.Join(dir, p.name), k); err != nil {
			return nil, err
		}
		keys[p.name] = k
	}
	return keys, nil
}

// demoPolicy writes the embedded promo-scorer policy into work/policies
// with the demo's keys: ana, ben and rita approve (two needed), ci signs
// gate reports.
func demoPolicy(work string, keys map[string]*release.Key) (string, error) {
	return demoPolicyFor(work, keys, "promo-scorer.yaml", "promo-scorer:prod")
}

// demoPolicyFor writes the embedded policy file with the demo's keys
// into work/policies and checks its rule for target asks what the demo
// needs.
func demoPolicyFor(work string, keys map[string]*release.Key, file, target string) (string, error) {
	raw, err := policies.FS.ReadFile(file)
	if err != nil {
		return "", err
	}
	text := string(raw)
	entry := func(name string) string {
		return fmt.Sprintf("        - name: %s\n          keyFile: ../keys/%s.pub.pem\n          keyId: \"%s\"\n", name, name, keys[name].ID)
	}
	for _, r := range []struct{ old, new string }{
		{"      required: 0\n      approvers: []\n", "      required: 2\n      approvers:\n" + entry("ana") + entry("ben") + entry("rita")},
		{"      reportSigners: []\n", "      reportSigners:\n" + entry("ci")},
	} {
		if !strings.Contains(text, r.old) {
			return "", fmt.Errorf("the embedded policy %s has no line %q to fill in", file, strings.TrimSpace(r.old))
		}
		text = strings.Replace(text, r.old, r.new, 1)
	}
	dir := filepath.Join(work, "policies")
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return "", err
	}
	p := filepath.Join(dir, file)
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		return "", err
	}
	pol, err := policy.Load(p)
	if err != nil {
		return "", fmt.Errorf("the demo's policy copy: %w", err)
	}
	if r, err := pol.Rule(target); err != nil || r.Approvals.Required != 2 || len(r.Approvals.ReportSigners) != 1 {
		return "", fmt.Errorf("the demo's policy copy does not say what the demo needs (%v)", err)
	}
	return p, nil
}

// demoBoundPolicies returns the policies the demo's first release records
// bind: its copies of the embedded policies with the demo's keys (the
// encoder scene writes the same listener-encoder copy again).
func demoBoundPolicies(work string, keys map[string]*release.Key, scorerPolicy string) (map[string]*policy.Policy, error) {
	encPath, err := demoPolicyFor(work, keys, "listener-encoder.yaml", "listener-encoder:prod")
	if err != nil {
		return nil, err
	}
	out := map[string]*policy.Policy{}
	for _, p := range []string{scorerPolicy, encPath} {
		pol, err := policy.Load(p)
		if err != nil {
			return nil, err
		}
		for _, t := range pol.Targets() {
			out[t] = pol
		}
	}
	return out, nil
}

// sub runs one modelgate command against g's store and returns its
// stdout and error, as a user typing it would get.
func sub(ctx context.Context, g *globals, args ...string) (string, error) {
	loc, err := g.storeLocation()
	if err != nil {
		return "", err
	}
	var out bytes.Buffer
	g2 := &globals{Stdout: &out, Stderr: io.Discard, Stdin: strings.NewReader("")}
	root := newRoot(g2)
	root.SetArgs(append([]string{"--store", loc, "--quiet"}, args...))
	err = root.ExecuteContext(ctx)
	g2.end()
	g2.finishJSON(err, exitCode(ctx, err))
	return out.String(), err
}

// releaseStory plays the release story on promo-scorer:prod and writes it
// to w as text.
func releaseStory(ctx context.Context, g *globals, w io.Writer, work string, sc *demo.Scenario, keys map[string]*release.Key, polPath string) error {
	const target = "promo-scorer:prod"
	keyFile := func(name string) string { return filepath.Join(work, "keys", name+".key.pem") }
	section := func(format string, args ...any) { fmt.Fprintf(w, "\n"+format+"\n", args...) }
	indent := func(s string) {
		for _, l := range strings.Split(strings.TrimRight(s, "\n"), "\n") {
			fmt.Fprintln(w, "   "+l)
		}
	}
	fmt.Fprintln(w, "The release story of "+target)
	fmt.Fprintln(w, strings.Repeat("=", 21+len(target)))
	var rep struct{ Entries []json.RawMessage }
	if out, err := sub(ctx, g, "log", "--json", target); err == nil {
		_ = json.Unmarshal([]byte(out), &rep)
	}
	if len(rep.Entries) > 1 {
		fmt.Fprintln(w, "The story already ran on this store; its release log, verified:")
		out, err := sub(ctx, g, "log", target)
		indent(out)
		return err
	}
	for _, p := range demoPeople {
		fmt.Fprintf(w, "key  %-5s %s  %s\n", p.name, keys[p.name].ID, p.role)
	}
	fmt.Fprintf(w, "policy %s: 2 approvals from ana, ben, rita; gate reports signed by ci\n", polPath)

	var baseline, better string
	var bad []demo.ScenarioModel
	for _, m := range sc.Models {
		switch {
		case m.Name == demo.ScorerBaseline:
			baseline = m.Tag
		case m.Name == demo.CandBetter:
			better = m.Tag
		case m.Name == demo.CandEncoderV2:
		case m.Kind == "scorer" && m.Role == "candidate":
			bad = append(bad, m)
		}
	}
	section("1. The baseline is released: %s → %s, the first record of the tag's release log.", target, baseline)

	section("2. CI gates the better candidate and signs the report.")
	fmt.Fprintf(w, "   $ modelgate gate %s --to %s --policy %s --sign-key %s\n", better, target, polPath, keyFile("ci"))
	var gate struct {
		Report       checks.Report `json:"report"`
		ReportDigest string        `json:"reportDigest"`
	}
	out, err := sub(ctx, g, "gate", "--json", better, "--to", target, "--policy", polPath, "--sign-key", keyFile("ci"))
	if jerr := json.Unmarshal([]byte(out), &gate); jerr != nil || err != nil {
		return fmt.Errorf("gating %s: %v %v", better, err, jerr)
	}
	for _, c := range gate.Report.Checks {
		fmt.Fprintf(w, "   %-4s  %-9s  %s\n", c.Status, c.Name, c.Summary)
	}
	fmt.Fprintf(w, "   verdict: %s; report %s\n", gate.Report.Verdict, gate.ReportDigest)

	section("3. Ana and Ben approve it, each with their own key.")
	for _, who := range []string{"ana", "ben"} {
		fmt.Fprintf(w, "   $ modelgate approve %s --to %s --policy … --key %s\n", better, target, keyFile(who))
		out, err := sub(ctx, g, "approve", better, "--to", target, "--policy", polPath, "--key", keyFile(who), "--comment", "holdout and slices read; fine by me")
		if err != nil {
			return fmt.Errorf("approving as %s: %w", who, err)
		}
		indent(out)
	}

	section("4. Rita, the release manager, promotes it; the tag moves by compare-and-swap on the baseline.")
	fmt.Fprintf(w, "   $ modelgate promote %s --to %s --policy … --key %s\n", better, target, keyFile("rita"))
	out, err = sub(ctx, g, "promote", better, "--to", target, "--policy", polPath, "--key", keyFile("rita"), "--reason", "better log loss on the holdout")
	if err != nil {
		return fmt.Errorf("promoting %s: %w", better, err)
	}
	indent(out)

	section("5. The bad candidates are refused by the gate, against what serves now.")
	for _, m := range bad {
		out, err := sub(ctx, g, "gate", "--json", m.Tag, "--to", target, "--policy", polPath, "--sign-key", keyFile("ci"))
		var gr struct {
			Report checks.Report `json:"report"`
		}
		if jerr := json.Unmarshal([]byte(out), &gr); jerr != nil {
			return fmt.Errorf("gating %s: %v %v", m.Tag, err, jerr)
		}
		if gr.Report.Verdict == checks.VerdictPass {
			return fmt.Errorf("the gate passed %s, which the demo built to fail its %s check", m.Tag, m.Fails)
		}
		fmt.Fprintf(w, "   %s (built to fail %s): gate %s, exit %d\n", m.Tag, m.Fails, gr.Report.Verdict, errkind.Of(err))
		for _, r := range gr.Report.Reasons {
			fmt.Fprintf(w, "      %s\n", r)
		}
	}
	if len(bad) > 0 {
		m := bad[0]
		fmt.Fprintf(w, "   $ modelgate promote %s --to %s --policy … --key %s\n", m.Tag, target, keyFile("rita"))
		_, err := sub(ctx, g, "promote", m.Tag, "--to", target, "--policy", polPath, "--key", keyFile("rita"))
		if err == nil {
			return fmt.Errorf("promote of %s succeeded", m.Tag)
		}
		fmt.Fprintf(w, "   refused, exit %d: %s\n", errkind.Of(err), strings.ReplaceAll(err.Error(), "\n", "\n   "))
	}

	section("6. On-call rolls back: no gate, constant work, a signed rollback record.")
	reason := "canary: fewer subscriptions to the promoted show since the release"
	fmt.Fprintf(w, "   $ modelgate rollback %s --reason %q --key %s\n", target, reason, keyFile("rita"))
	out, err = sub(ctx, g, "rollback", target, "--reason", reason, "--key", keyFile("rita"))
	if err != nil {
		return fmt.Errorf("rolling back: %w", err)
	}
	indent(out)

	if err := encoderScene(ctx, g, w, work, sc, keys, polPath); err != nil {
		return err
	}

	section("8. The release log, every signature and link verified against the policy's keys.")
	fmt.Fprintf(w, "   $ modelgate log %s --policy %s\n", target, polPath)
	out, err = sub(ctx, g, "log", target, "--policy", polPath)
	indent(out)
	if err != nil {
		return fmt.Errorf("the demo's release log does not verify: %w", err)
	}
	return nil
}

// encoderScene plays the release of a new encoder with the scorer
// refitted on its code: the encoder alone refused (the live scorer reads
// the old code), then both released together under one record.
func encoderScene(ctx context.Context, g *globals, w io.Writer, work string, sc *demo.Scenario, keys map[string]*release.Key, scorerPol string) error {
	const encTarget, scTarget = "listener-encoder:prod", "promo-scorer:prod"
	keyFile := func(name string) string { return filepath.Join(work, "keys", name+".key.pem") }
	encPol, err := demoPolicyFor(work, keys, "listener-encoder.yaml", encTarget)
	if err != nil {
		return err
	}
	var enc, scorer string
	for _, m := range sc.Models {
		switch m.Name {
		case demo.EncoderV2:
			enc = m.Tag
		case demo.CandEncoderV2:
			scorer = m.Tag
		}
	}
	if enc == "" || scorer == "" {
		return fmt.Errorf("the demo scenario lacks %s or %s", demo.EncoderV2, demo.CandEncoderV2)
	}
	indent := func(s string) {
		for _, l := range strings.Split(strings.TrimRight(s, "\n"), "\n") {
			fmt.Fprintln(w, "   "+l)
		}
	}
	run := func(args ...string) (string, error) {
		out, err := sub(ctx, g, args...)
		if err != nil {
			return out, fmt.Errorf("%s: %w", strings.Join(args[:2], " "), err)
		}
		return out, nil
	}
	gateAndApprove := func(cand, target, pol string, with ...string) error {
		args := []string{"gate", "--json", cand, "--to", target, "--policy", pol, "--sign-key", keyFile("ci")}
		shown := fmt.Sprintf("   $ modelgate gate %s --to %s --policy … --sign-key %s", cand, target, keyFile("ci"))
		for _, x := range with {
			args = append(args, "--with", x)
			shown += " --with " + x
		}
		fmt.Fprintln(w, shown)
		var gr struct {
			Report       checks.Report `json:"report"`
			ReportDigest string        `json:"reportDigest"`
		}
		out, err := sub(ctx, g, args...)
		if jerr := json.Unmarshal([]byte(out), &gr); jerr != nil || err != nil {
			return fmt.Errorf("gating %s: %v %v", cand, err, jerr)
		}
		for _, c := range gr.Report.Checks {
			fmt.Fprintf(w, "   %-4s  %-9s  %s\n", c.Status, c.Name, c.Summary)
		}
		fmt.Fprintf(w, "   verdict: %s; report %s\n", gr.Report.Verdict, gr.ReportDigest)
		for _, who := range []string{"ana", "ben"} {
			if _, err := run("approve", cand, "--to", target, "--policy", pol, "--key", keyFile(who), "--comment", "read the report; fine by me"); err != nil {
				return fmt.Errorf("approving %s as %s: %w", cand, who, err)
			}
		}
		fmt.Fprintln(w, "   approved by ana and ben")
		return nil
	}

	fmt.Fprintf(w, "\n7. A new encoder, with the scorer refitted on its code: one release.\n")
	fmt.Fprintf(w, "   %s serves a scorer trained on the code of %s's live encoder; %s computes another code.\n", scTarget, encTarget, enc)
	fmt.Fprintf(w, "   policy %s: 2 approvals from ana, ben, rita; gate reports signed by ci\n", encPol)
	fmt.Fprintln(w, "\n   7a. The encoder is gated and approved under its own policy.")
	if err := gateAndApprove(enc, encTarget, encPol); err != nil {
		return err
	}
	fmt.Fprintln(w, "\n   7b. Promoting the encoder alone is refused: the live scorer reads its code.")
	fmt.Fprintf(w, "   $ modelgate promote %s --to %s --policy … --key %s\n", enc, encTarget, keyFile("rita"))
	if _, err := sub(ctx, g, "promote", enc, "--to", encTarget, "--policy", encPol, "--policy", scorerPol, "--key", keyFile("rita")); err == nil {
		return fmt.Errorf("promoting %s alone succeeded under the live %s", enc, scTarget)
	} else if !strings.Contains(err.Error(), scTarget) {
		return fmt.Errorf("promoting %s alone was refused without naming %s: %w", enc, scTarget, err)
	} else {
		fmt.Fprintf(w, "   refused, exit %d: %s\n", errkind.Of(err), strings.ReplaceAll(err.Error(), "\n", "\n   "))
	}
	fmt.Fprintf(w, "\n   7c. The refitted scorer is gated in the world after the release: its freeze check reads %s, the encoder that will be live.\n", enc)
	if err := gateAndApprove(scorer, scTarget, scorerPol, enc+"="+encTarget); err != nil {
		return err
	}
	fmt.Fprintln(w, "\n   7d. Rita releases both together: one signed record, the scorer moved first, then the encoder.")
	fmt.Fprintf(w, "   $ modelgate promote %s --to %s --with %s=%s --policy … --policy … --key %s\n", enc, encTarget, scorer, scTarget, keyFile("rita"))
	out, err := run("promote", enc, "--to", encTarget, "--with", scorer+"="+scTarget, "--policy", encPol, "--policy", scorerPol,
		"--key", keyFile("rita"), "--reason", "encoder refitted on a later sample; scorer refitted on its code")
	if err != nil {
		return err
	}
	indent(out)
	fmt.Fprintln(w, "\n   7e. On-call rolls the encoder back: its scorer goes back with it, in one rollback record.")
	reason := "drill: the new code, back to the old one"
	fmt.Fprintf(w, "   $ modelgate rollback %s --reason %q --key %s\n", encTarget, reason, keyFile("rita"))
	if out, err = run("rollback", encTarget, "--reason", reason, "--key", keyFile("rita")); err != nil {
		return err
	}
	indent(out)
	fmt.Fprintf(w, "   $ modelgate log %s --policy %s\n", encTarget, encPol)
	out, err = sub(ctx, g, "log", encTarget, "--policy", encPol)
	indent(out)
	if err != nil {
		return fmt.Errorf("the release log of %s does not verify: %w", encTarget, err)
	}
	return nil
}
