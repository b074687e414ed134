package main

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"time"

	"github.com/schollz/progressbar/v3"
	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/data"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/score"
)

type scoreOptions struct {
	Holdout   string
	Out       string
	Layer     string
	BatchSize int
	Threads   int
}

func (o *scoreOptions) AddFlags(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&o.Holdout, "holdout", "", "holdout to score: a .parquet/.jsonl file, or a holdout artifact NAME:TAG / NAME@DIGEST in the store (required)")
	f.StringVar(&o.Out, "out", "", "predictions file: .parquet, .jsonl or .csv (required)")
	f.StringVar(&o.Layer, "layer", "", "layer to output (default the model's output; for an encoder e.g. code or reconstruction)")
	f.IntVar(&o.BatchSize, "batch-size", 4096, "rows per batch")
	f.IntVar(&o.Threads, "threads", 0, "runtime threads (0: all cores)")
}

func newScoreCmd(g *globals) *cobra.Command {
	o := &scoreOptions{}
	cmd := &cobra.Command{
		Use:   "score REF --holdout FILE|REF --out FILE",
		Short: "Run a stored model over a holdout and write its outputs with row ids",
		Long: `score runs the model REF with modelgate's own runtime (float32, CPU) over
every row of a holdout and writes one row per input: row_id and the
output layer's values (a scorer's probability; an encoder's code, or its
reconstruction with --layer).`,
		Args: exactArgs(1, "REF"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runScore(cmd.Context(), g, o, args[0])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

// scoreSummary is score's --json output.
type scoreSummary struct {
	Ref     string  `json:"ref"`
	Digest  string  `json:"digest"`
	Holdout string  `json:"holdout"`
	Layer   string  `json:"layer"`
	Rows    int64   `json:"rows"`
	Out     string  `json:"out"`
	Seconds float64 `json:"seconds"`
}

func runScore(ctx context.Context, g *globals, o *scoreOptions, refStr string) error {
	if o.Holdout == "" || o.Out == "" {
		return usageErr("score needs --holdout and --out")
	}
	if _, err := data.FormatOf(o.Out); err != nil {
		return err
	}
	ref, err := parseRef(refStr)
	if err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	l, err := artifact.Load(ctx, store, ref)
	if err != nil {
		return err
	}
	m, err := score.Prepare(l)
	if err != nil {
		return err
	}
	open, name, cleanup, err := holdoutSource(ctx, store, o.Holdout)
	if err != nil {
		return err
	}
	defer cleanup()
	r, err := open(m.ReadOptions(name, false))
	if err != nil {
		return err
	}
	defer r.Close()
	layer := o.Layer
	if layer == "" {
		layer = m.Net.Output()
	}
	if m.Net.Width(layer) == 0 {
		return usageErr("model %s has no layer %q", ref, layer)
	}
	w, err := data.CreatePredictions(o.Out, m.Columns(layer))
	if err != nil {
		return err
	}
	var bar *progressbar.ProgressBar
	if g.interactive() {
		bar = progressbar.NewOptions64(r.Rows(), progressbar.OptionSetWriter(g.Stderr),
			progressbar.OptionSetDescription("scoring "+ref.String()), progressbar.OptionShowCount(),
			progressbar.OptionShowIts(), progressbar.OptionSetItsString("rows"), progressbar.OptionSetPredictTime(true),
			progressbar.OptionClearOnFinish(), progressbar.OptionThrottle(100*time.Millisecond))
	}
	var prog func(done, total int64)
	switch {
	case bar != nil:
	case g.JSON && !g.Quiet:
		enc := json.NewEncoder(g.Stderr)
		prog = func(done, total int64) {
			_ = enc.Encode(progressEvent{Event: "progress", Phase: "score", Name: ref.String(), Done: done, Total: total})
		}
	default:
		if p := g.plainProgress(); p != nil {
			prog = func(done, total int64) { p.event("score", ref.String(), done, total, "rows") }
		}
	}
	start := time.Now()
	rows, err := score.Run(ctx, m, r, w, score.Options{Layer: layer, BatchSize: o.BatchSize, Threads: o.Threads,
		Progress: func(done, total int64) {
			switch {
			case bar != nil:
				_ = bar.Set64(done)
			case prog != nil:
				prog(done, total)
			}
		}})
	if bar != nil {
		_ = bar.Finish()
	}
	if err != nil {
		return err
	}
	sum := scoreSummary{Ref: ref.String(), Digest: l.Artifact.Desc.Digest.String(), Holdout: o.Holdout, Layer: layer,
		Rows: rows, Out: o.Out, Seconds: time.Since(start).Seconds()}
	if g.JSON {
		return g.printJSON(sum)
	}
	g.logf("scored %d rows with %s (%s) in %.2fs: %s written", rows, ref, layer, sum.Seconds, o.Out)
	_, err = fmt.Fprintln(g.Stdout, o.Out)
	return err
}

// holdoutSource resolves --holdout: an existing file is read as it is;
// otherwise it must name a holdout artifact, read through the store (and
// the local blob cache).
func holdoutSource(ctx context.Context, store registry.Store, s string) (open func(data.Options) (data.Reader, error), name string, cleanup func(), err error) {
	if st, err := os.Stat(s); err == nil && !st.IsDir() {
		return func(o data.Options) (data.Reader, error) { return data.Open(s, o) }, s, func() {}, nil
	}
	ref, err := registry.ParseRef(s, false)
	if err != nil {
		return nil, "", nil, usageErr("--holdout %q is neither a file nor a holdout reference: %v", s, err)
	}
	h, err := artifact.FetchHoldout(ctx, store, ref)
	if err != nil {
		return nil, "", nil, err
	}
	return h.Open, ref.String(), h.Close, nil
}
