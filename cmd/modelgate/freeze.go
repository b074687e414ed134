package main

import (
	"context"
	"fmt"
	"io"
	"strings"
	"text/tabwriter"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/freeze"
	"github.com/modelgate/modelgate/internal/report"
)

type freezeOptions struct {
	Encoder     string
	Out         string
	Storage     string
	MaxError    float64
	Holdout     string
	HoldoutRows int
}

func (o *freezeOptions) AddFlags(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&o.Encoder, "encoder", "", "the encoder to freeze onto (NAME:TAG or NAME@DIGEST); it must be the exact digest the scorer names")
	f.StringVar(&o.Out, "out", "", "where to push the frozen scorer, NAME:TAG (required)")
	f.StringVar(&o.Storage, "storage", freeze.StorageF32, "storage of the head tensors: f32 (as stored), f16 or bf16; the encoder blob is never converted")
	f.Float64Var(&o.MaxError, "max-error", freeze.DefaultMaxError, "f16/bf16: refuse when an output changes by more than this (absolute)")
	f.StringVar(&o.Holdout, "holdout", "", "also verify on a sample of this holdout: a .parquet/.jsonl file or a holdout artifact NAME:TAG")
	f.IntVar(&o.HoldoutRows, "holdout-rows", freeze.DefaultHoldoutRows, "rows sampled from --holdout (seeded, reproducible)")
}

func newFreezeCmd(g *globals) *cobra.Command {
	o := &freezeOptions{}
	cmd := &cobra.Command{
		Use:   "freeze SCORER_REF --out NAME:TAG [--encoder ENCODER_REF] [--storage f32|f16|bf16 --max-error X] [--holdout REF|FILE]",
		Short: "Make a scorer self-contained: its encoder embedded as constants, shared by digest",
		Long: `freeze turns a scorer that uses an encoder (by digest, or as its own embedded
copy still marked trainable) into one artifact whose encoder part is
constants: the encoder artifact's own tensor blob, shared by digest, so the
store holds those bytes once however many scorers are frozen on it. It strips
training-only state (trainable flags, optimizer slots, regularisation terms,
dropout) and lists it, records the source scorer, encoder and tool version,
and verifies the result before writing anything: the frozen scorer's outputs
on the probe rows (and a --holdout sample) must equal the unfrozen
composition — the encoder run on its own, then the source's head — bit for
bit, or within --max-error when the head is stored as f16 or bf16. Only the
head is converted: a converted encoder would no longer be the encoder
version the scorer names; publish a reduced-precision encoder as its own
version instead. The verification is stored as a freeze record, a report
artifact whose subject is the frozen scorer, and printed.

A scorer already frozen is left as it is (exit 0).`,
		Args: exactArgs(1, "SCORER_REF"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runFreeze(cmd.Context(), g, o, args[0])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runFreeze(ctx context.Context, g *globals, o *freezeOptions, refStr string) error {
	if o.Out == "" {
		return usageErr("freeze needs --out NAME:TAG")
	}
	ref, err := parseRef(refStr)
	if err != nil {
		return err
	}
	out, err := parseRef(o.Out)
	if err != nil {
		return err
	}
	if o.MaxError <= 0 {
		return usageErr("--max-error %v: want a positive number", o.MaxError)
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	check := g.tagCheck(store)
	g.logf("freezing %s", ref)
	res, err := freeze.Scorer(ctx, store, ref, freeze.Options{
		Encoder: o.Encoder, Out: out, Storage: o.Storage, MaxError: o.MaxError,
		Holdout: o.Holdout, HoldoutRows: o.HoldoutRows, Progress: g.progress(), TagCheck: check,
	})
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(res)
	}
	return printFreeze(g.Stdout, res)
}

// printFreeze renders a freeze result as text.
func printFreeze(w io.Writer, res *freeze.Result) error {
	if res.AlreadyFrozen {
		_, err := fmt.Fprintln(w, res.Message)
		return err
	}
	rec := res.Record
	v := rec.Verification
	fmt.Fprintf(w, "froze %s (%s)\n  onto encoder %s (%s)\n", res.Source.Ref, res.Source.Digest, res.Encoder.Ref, res.Encoder.Digest)
	fmt.Fprintf(w, "frozen scorer  %s  %s  (%d blob(s) written, %s; %d already in the store)\n",
		res.Frozen.Ref, res.Frozen.Digest, res.Push.BlobsWritten, report.HumanBytes(res.Push.BytesWritten), res.Push.BlobsSkipped)
	fmt.Fprintf(w, "freeze record  %s  (a report whose subject is the frozen scorer)\n\n", res.RecordRef)

	status := "PASS"
	if !v.Passed {
		status = "FAIL"
	}
	rule := "bit-identical to"
	if !v.Exact {
		rule = fmt.Sprintf("within %g (absolute) of", v.Bound)
	}
	fmt.Fprintf(w, "verification   %s  %s storage, %s the composition: %s\n", status, rec.Storage, rule, v.Reference)
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	for _, s := range v.Sets {
		rows := fmt.Sprintf("%d rows", s.Rows)
		if s.Total > int64(s.Rows) {
			rows = fmt.Sprintf("%d of %d rows (seeded sample)", s.Rows, s.Total)
		}
		fmt.Fprintf(tw, "  %s\t%s\t%d of %d outputs differ\tmax abs %.3g\tmax rel %.3g\t%s\n", s.Name, rows, s.Mismatches, s.Outputs, s.MaxAbs, s.MaxRel, s.From)
	}
	tw.Flush()
	for _, p := range v.Problems {
		fmt.Fprintf(w, "  problem: %s\n", p)
	}
	if a := rec.AgainstSource; a != nil {
		if a.Mismatches == 0 {
			fmt.Fprintf(w, "against the source as stored: all %d outputs bit-identical\n", a.Outputs)
		} else {
			fmt.Fprintf(w, "against the source as stored: %d of %d outputs differ, max abs %.3g, max rel %.3g\n", a.Mismatches, a.Outputs, a.MaxAbs, a.MaxRel)
		}
	}
	if c := rec.EmbeddedCopy; c != nil {
		if !c.Differed {
			fmt.Fprintf(w, "embedded copy: the scorer's own copy of the encoder equals %s bit for bit (%d tensor(s))\n", res.Encoder.Digest, len(c.Tensors))
		} else {
			fmt.Fprintf(w, "embedded copy: the scorer's own copy DIFFERED from %s (max abs %.3g); the frozen scorer carries the named encoder's values:\n", res.Encoder.Digest, c.MaxAbs)
			for _, d := range c.Tensors {
				fmt.Fprintf(w, "  %s (layer %s %s): %d of %d values differ, max abs %.3g\n", d.Tensor, d.Layer, d.Role, d.Differing, d.Values, d.MaxAbs)
			}
		}
	}

	fmt.Fprintln(w, "\nencoder blobs, shared by digest:")
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	for _, b := range rec.EncoderBlobs {
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", b.File, b.Digest, report.HumanBytes(b.Size), strings.Join(b.Tensors, ", "))
	}
	tw.Flush()
	fmt.Fprintln(w, "head files:")
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	for _, h := range rec.HeadFiles {
		how := "byte-identical to the source's " + h.Source
		if !h.Identical {
			how = "re-encoded: " + h.Why
		}
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", h.File, h.Digest, report.HumanBytes(h.Size), how)
	}
	tw.Flush()
	if len(rec.Stripped) == 0 {
		fmt.Fprintln(w, "stripped: nothing (no training-only state was attached)")
	} else {
		fmt.Fprintln(w, "stripped:")
		tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
		for _, s := range rec.Stripped {
			fmt.Fprintf(tw, "  %s\t%s\t%s\n", s.Kind, s.Name, s.Detail)
		}
		tw.Flush()
	}
	if len(rec.Renamed) > 0 {
		fmt.Fprintln(w, "renamed (the scorer's names that clashed with the encoder's):")
		for _, r := range rec.Renamed {
			fmt.Fprintf(w, "  %s %s -> %s\n", r.Kind, r.From, r.To)
		}
	}
	for _, n := range rec.Notes {
		fmt.Fprintf(w, "note: %s\n", n)
	}
	return nil
}
