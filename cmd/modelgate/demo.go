package main

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"modelgate/internal/demo"
	"modelgate/internal/errkind"
)

type demoOptions struct {
	Work string
	Seed uint64
}

func (o *demoOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Work, "work", "", "where to write the generated model directories and holdouts (default: a demo folder beside the default store)")
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
production tags point at the baselines. Everything is invented data.`,
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
		d, err := defaultStoreDir()
		if err != nil {
			return err
		}
		work = filepath.Join(filepath.Dir(d), "demo")
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
	pub, err := demo.Publish(ctx, store, sc, say)
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(map[string]any{"store": store.String(), "work": work, "artifacts": pub, "scenario": sc,
			"seconds": time.Since(start).Seconds()})
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
	fmt.Fprintln(w, "\nTry:")
	fmt.Fprintln(w, "  modelgate ls")
	fmt.Fprintln(w, "  modelgate show promo-scorer:cand-better")
	fmt.Fprintln(w, "  modelgate diff promo-scorer:baseline promo-scorer:cand-shuffled-vocab")
	fmt.Fprintln(w, "  modelgate score promo-scorer:prod --holdout promo-holdout:v1 --out predictions.csv")
	fmt.Fprintln(w, "  modelgate verify")
	return nil
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
