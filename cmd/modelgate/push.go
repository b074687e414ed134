package main

import (
	"context"
	"fmt"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/report"
)

type pushOptions struct {
	Kind          string
	ClusterColumn string
}

func (o *pushOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Kind, "kind", "model", "what to push: model (a model directory) or holdout (a Parquet or JSON Lines file)")
	cmd.Flags().StringVar(&o.ClusterColumn, "cluster-column", "", "holdouts: the column (string or integer) naming the listener a row belongs to, when a listener has several rows; the gate's test is then cluster-robust")
}

func newPushCmd(g *globals) *cobra.Command {
	o := &pushOptions{}
	cmd := &cobra.Command{
		Use:   "push DIR|FILE NAME:TAG",
		Short: "Validate a model directory and store it as an OCI artifact",
		Long: `push validates a model directory (spec.json, safetensors files, vocabulary,
stats, probes) and stores it as one OCI artifact: blobs first, then the
manifest, then the tag. Blobs already in the store are not written again.
With --kind holdout, push checks a holdout file (Parquet or JSON Lines) row
by row and stores it, digest-pinned, for the gate; a row_id given twice is
refused. A scorer whose spec.json names its encoder as NAME:TAG without a
digest (encoder.name only) has the tag resolved here: the stored spec names
the digest the tag pointed at, and the output says which (encoderPinned).
When a listener has several rows (listener × show), name the
listener column with --cluster-column: the gate then sums a listener's rows
together for its test, and a row_id may repeat within one listener's rows
only. Prints the manifest digest.`,
		Args: exactArgs(2, "DIR NAME:TAG"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runPush(cmd.Context(), g, o, args[0], args[1])
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runPush(ctx context.Context, g *globals, o *pushOptions, dir, refStr string) error {
	ref, err := parseRef(refStr)
	if err != nil {
		return err
	}
	if o.Kind != "model" && o.Kind != "holdout" {
		return usageErr("--kind %q: use model or holdout", o.Kind)
	}
	if o.ClusterColumn != "" && o.Kind != "holdout" {
		return usageErr("--cluster-column applies to --kind holdout")
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	check := g.tagCheck(store)
	var res *artifact.PushResult
	if o.Kind == "holdout" {
		res, err = artifact.PushHoldout(ctx, store, dir, ref, artifact.Options{Progress: g.progress(), ClusterColumn: o.ClusterColumn, TagCheck: check})
	} else {
		res, err = artifact.PushModelDir(ctx, store, dir, ref, artifact.Options{Progress: g.progress(), TagCheck: check})
	}
	if err != nil {
		return err
	}
	return printPush(g, res)
}

func printPush(g *globals, res *artifact.PushResult) error {
	if g.JSON {
		return g.printJSON(res)
	}
	if p := res.EncoderPinned; p != nil {
		g.logf("encoder %s pinned: the stored spec names %s", p.Name, p.Digest)
	}
	g.logf("pushed %s %s: %d blob(s) written (%s), %d already present%s", res.Kind, res.Ref,
		res.BlobsWritten, report.HumanBytes(res.BytesWritten), res.BlobsSkipped, map[bool]string{true: ", identical manifest reused", false: ""}[res.ManifestReused])
	_, err := fmt.Fprintln(g.Stdout, res.Digest)
	return err
}
