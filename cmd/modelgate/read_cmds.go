package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/report"
)

func newPullCmd(g *globals) *cobra.Command {
	return &cobra.Command{
		Use:   "pull REF DIR",
		Short: "Write a stored model back out as a model directory",
		Long:  "pull writes the model REF (NAME:TAG or NAME@DIGEST) into DIR as a model directory, verifying every blob's digest, and prints the manifest digest.",
		Args:  exactArgs(2, "REF DIR"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runPull(cmd.Context(), g, args[0], args[1])
		},
	}
}

func runPull(ctx context.Context, g *globals, refStr, dir string) error {
	ref, err := parseRef(refStr)
	if err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	a, err := artifact.Pull(ctx, store, ref, dir, artifact.Options{Progress: g.progress()})
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(map[string]any{"ref": ref.String(), "digest": a.Desc.Digest.String(), "kind": a.Kind(), "dir": dir})
	}
	g.logf("pulled %s %s into %s", a.Kind(), ref, dir)
	_, err = fmt.Fprintln(g.Stdout, a.Desc.Digest)
	return err
}

// lsRow is one tag in `ls`.
type lsRow struct {
	Repository string `json:"repository"`
	Tag        string `json:"tag"`
	Digest     string `json:"digest"`
	Kind       string `json:"kind"`
	Created    string `json:"created,omitempty"`
	Size       int64  `json:"size"`
}

func newLsCmd(g *globals) *cobra.Command {
	return &cobra.Command{
		Use:   "ls [NAME]",
		Short: "List repositories and their tags",
		Args:  cobra.MaximumNArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			name := ""
			if len(args) == 1 {
				name = args[0]
			}
			return runLs(cmd.Context(), g, name)
		},
	}
}

func runLs(ctx context.Context, g *globals, name string) error {
	store, err := g.openStore()
	if err != nil {
		return err
	}
	var repos []string
	if name != "" {
		if err := registry.ValidateRepository(name); err != nil {
			return err
		}
		repos = []string{name}
	} else if repos, err = store.Repositories(ctx); err != nil {
		if errors.Is(err, registry.ErrNoCatalog) {
			return noCatalogErr(err, "ls NAME")
		}
		return err
	}
	rows := []lsRow{}
	for _, repo := range repos {
		tags, err := store.Tags(ctx, repo)
		if err != nil {
			return err
		}
		if name != "" && len(tags) == 0 {
			return errkind.New(errkind.BadInput, "no repository %q in %s", name, store)
		}
		for _, tag := range tags {
			row := lsRow{Repository: repo, Tag: tag}
			a, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: repo, Tag: tag})
			if err != nil {
				return fmt.Errorf("%s:%s: %w", repo, tag, err)
			}
			row.Digest, row.Kind = a.Desc.Digest.String(), a.Kind()
			row.Created = a.Manifest.Annotations[artifact.AnnotationCreated]
			row.Size = a.Desc.Size + a.Manifest.Config.Size
			for _, l := range a.Manifest.Layers {
				row.Size += l.Size
			}
			rows = append(rows, row)
		}
	}
	if g.JSON {
		return g.printJSON(rows)
	}
	tw := tabwriter.NewWriter(g.Stdout, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "NAME:TAG\tKIND\tDIGEST\tSIZE\tCREATED")
	for _, r := range rows {
		fmt.Fprintf(tw, "%s:%s\t%s\t%s\t%s\t%s\n", r.Repository, r.Tag, r.Kind, shortDigest(r.Digest), report.HumanBytes(r.Size), r.Created)
	}
	return tw.Flush()
}

func shortDigest(d string) string {
	if len(d) > 19 {
		return d[:19]
	}
	return d
}

func newShowCmd(g *globals) *cobra.Command {
	return &cobra.Command{
		Use:   "show REF",
		Short: "Describe an artifact: a model's inputs, layers, sizes, lineage; a holdout's rows, labels, slices; tags, blobs, annotations",
		Args:  exactArgs(1, "REF"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runShow(cmd.Context(), g, args[0])
		},
	}
}

func runShow(ctx context.Context, g *globals, refStr string) error {
	ref, err := parseRef(refStr)
	if err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	d, err := artifact.Describe(ctx, store, ref)
	if err != nil {
		return err
	}
	if g.JSON {
		if err := g.printJSON(d); err != nil {
			return err
		}
	} else {
		printDescription(g, d)
	}
	if d.EncoderMissing != nil && len(d.Problems) == 1 {
		// Nothing is damaged: the encoder the scorer needs is not there.
		return errkind.Wrap(errkind.BadInput, fmt.Errorf("%s: %w", ref, d.EncoderMissing))
	}
	if len(d.Problems) > 0 {
		return errkind.New(errkind.Integrity, "%s has %d problem(s); run `modelgate verify`", ref, len(d.Problems))
	}
	return nil
}

func printDescription(g *globals, d *artifact.Description) {
	if d.Kind != "encoder" && d.Kind != "scorer" {
		printOther(g, d)
		return
	}
	w := g.Stdout
	fmt.Fprintf(w, "%s  %s\n", d.Ref, d.Digest)
	fmt.Fprintf(w, "kind:        %s (%s)\n", d.Kind, d.ArtifactType)
	fmt.Fprintf(w, "name:        %s\n", d.Name)
	if d.Description != "" {
		fmt.Fprintf(w, "description: %s\n", d.Description)
	}
	fmt.Fprintf(w, "tags:        %s\n", strings.Join(d.Tags, ", "))
	fmt.Fprintf(w, "size:        %s in %d blobs, %d parameters, %d probe rows\n", report.HumanBytes(d.TotalSize), len(d.Blobs), d.Params, d.Probes)
	fmt.Fprintln(w, "\ninputs:")
	for _, in := range d.Inputs.Sparse {
		fmt.Fprintf(w, "  sparse %-20s vocabulary %d (%s), unknown ids: %s, transform %s, duplicates: %s\n",
			in.Name, in.VocabularySize, in.Vocabulary, in.Unknown, in.Transform, in.Duplicates)
	}
	for _, in := range d.Inputs.Dense {
		fmt.Fprintf(w, "  dense  %-20s %d value(s), describes the %s\n", in.Name, in.Size, in.Describes)
	}
	if d.Encoder != nil {
		how := "referenced by digest"
		if d.Encoder.Embedded {
			how = "embedded"
		}
		fmt.Fprintf(w, "\nencoder:     %s (%s), %s, uses layer %q\n", d.Encoder.Digest, d.Encoder.Name, how, d.Encoder.Output)
	}
	fmt.Fprintln(w, "\nlayers:")
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "  NAME\tOP\tINPUT\tWEIGHT\tSHAPE\tACT\tWIDTH\tPARAMS")
	for _, l := range d.Layers {
		shape := ""
		if l.Shape != nil {
			shape = fmt.Sprint(l.Shape)
		}
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\t%s\t%s\t%d\t%d\n", l.Name, l.Op, l.Inputs, l.Weight, shape, l.Activation, l.Width, l.Params)
	}
	tw.Flush()
	fmt.Fprintln(w, "\ntensors:")
	tw = tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "  NAME\tFILE\tSHAPE\tDTYPE\tPART\tTRAINABLE")
	for _, t := range d.Tensors {
		fmt.Fprintf(tw, "  %s\t%s\t%v\t%s\t%s\t%v\n", t.Name, t.File, t.Shape, t.DType, t.Part, t.Trainable)
	}
	tw.Flush()
	if tr := d.Training; tr != nil && (len(tr.Regularization)+len(tr.OptimizerSlots)+len(tr.Dropout)) > 0 {
		fmt.Fprintln(w, "\ntraining-only state left attached:")
		for _, r := range tr.Regularization {
			fmt.Fprintf(w, "  regularisation %s on %s, weight %g\n", r.Type, r.Tensor, r.Weight)
		}
		for _, o := range tr.OptimizerSlots {
			fmt.Fprintf(w, "  optimizer slot %q of %s in tensor %s\n", o.Slot, o.Of, o.Tensor)
		}
		for _, dr := range tr.Dropout {
			fmt.Fprintf(w, "  dropout %g after layer %s\n", dr.Rate, dr.Layer)
		}
	}
	fmt.Fprintln(w, "\nlineage:")
	ln := d.Lineage
	for _, kv := range [][2]string{{"training data", ln.TrainingData}, {"source", ln.SourceRepository}, {"commit", ln.SourceCommit}, {"created by", ln.CreatedBy}, {"frozen from", ln.FrozenFrom}} {
		if kv[1] != "" {
			fmt.Fprintf(w, "  %-14s %s\n", kv[0]+":", kv[1])
		}
	}
	printReferrers(w, d)
	printBlobsAndAnnotations(w, d)
}

// printOther prints an artifact that is not a model: a holdout's summary,
// or what a report, approval or release record is about.
func printOther(g *globals, d *artifact.Description) {
	w := g.Stdout
	fmt.Fprintf(w, "%s  %s\n", d.Ref, d.Digest)
	fmt.Fprintf(w, "kind:        %s (%s)\n", d.Kind, d.ArtifactType)
	fmt.Fprintf(w, "tags:        %s\n", strings.Join(d.Tags, ", "))
	fmt.Fprintf(w, "size:        %s in %d blobs\n", report.HumanBytes(d.TotalSize), len(d.Blobs))
	if d.Subject != "" {
		fmt.Fprintf(w, "about:       %s\n", d.Subject)
	}
	if h := d.Holdout; h != nil {
		fmt.Fprintf(w, "file:        %s (%s)\n", h.File, h.Format)
		fmt.Fprintf(w, "rows:        %d, %d (item, value) pairs (%.2f per row)\n", h.Rows, h.Nonzeros, float64(h.Nonzeros)/float64(max(h.Rows, 1)))
		if h.HasLabels {
			fmt.Fprintf(w, "labels:      %d positive (%.2f%%)\n", h.Positives, 100*float64(h.Positives)/float64(max(h.Rows, 1)))
		} else {
			fmt.Fprintln(w, "labels:      none (usable for encoders only)")
		}
		if h.ClusterColumn != "" {
			fmt.Fprintf(w, "clusters:    %d by column %q (rows of one cluster are tested together)\n", h.Clusters, h.ClusterColumn)
		}
		if len(h.Slices) > 0 {
			names := make([]string, 0, len(h.Slices))
			for k := range h.Slices {
				names = append(names, k)
			}
			sort.Slice(names, func(i, j int) bool {
				if h.Slices[names[i]] != h.Slices[names[j]] {
					return h.Slices[names[i]] > h.Slices[names[j]]
				}
				return names[i] < names[j]
			})
			fmt.Fprintf(w, "slices:      %d value(s)\n", len(names))
			for i, k := range names {
				if i == 20 {
					fmt.Fprintf(w, "  … %d more\n", len(names)-i)
					break
				}
				label := strconv.Quote(k)
				if k == "" {
					label = "(none)"
				}
				fmt.Fprintf(w, "  %-24s %d rows\n", label, h.Slices[k])
			}
		}
	}
	printReferrers(w, d)
	printBlobsAndAnnotations(w, d)
}

func printBlobsAndAnnotations(w io.Writer, d *artifact.Description) {
	fmt.Fprintln(w, "\nblobs:")
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	for _, b := range d.Blobs {
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", b.Title, b.MediaType, shortDigest(b.Digest), report.HumanBytes(b.Size))
	}
	tw.Flush()
	fmt.Fprintln(w, "\nannotations:")
	keys := make([]string, 0, len(d.Annotations))
	for k := range d.Annotations {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	for _, k := range keys {
		fmt.Fprintf(w, "  %s = %s\n", k, d.Annotations[k])
	}
	if len(d.Problems) > 0 {
		fmt.Fprintln(w, "\nPROBLEMS:")
		for _, p := range d.Problems {
			fmt.Fprintf(w, "  %s\n", p)
		}
	}
}

func newDiffCmd(g *globals) *cobra.Command {
	return &cobra.Command{
		Use:   "diff REF_A REF_B",
		Short: "Compare two models: spec values, tensors, vocabulary, sizes",
		Args:  exactArgs(2, "REF_A REF_B"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runDiff(cmd.Context(), g, args[0], args[1])
		},
	}
}

func runDiff(ctx context.Context, g *globals, a, b string) error {
	ra, err := parseRef(a)
	if err != nil {
		return err
	}
	rb, err := parseRef(b)
	if err != nil {
		return err
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	d, err := artifact.Diff(ctx, store, ra, rb)
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(d)
	}
	w := g.Stdout
	fmt.Fprintf(w, "A %s  %s  %s\nB %s  %s  %s\n", a, d.DigestA, report.HumanBytes(d.SizeA), b, d.DigestB, report.HumanBytes(d.SizeB))
	if d.Identical {
		fmt.Fprintln(w, "identical artifacts")
		return nil
	}
	fmt.Fprintf(w, "%d blob(s) shared\n", d.SharedBlobs)
	fmt.Fprintf(w, "\nspec: %d difference(s)\n", len(d.Spec))
	for _, c := range d.Spec {
		fmt.Fprintf(w, "  %s: %s -> %s\n", c.Pointer, orNone(c.A), orNone(c.B))
	}
	fmt.Fprintln(w, "\ntensors:")
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "  NAME\tCHANGE\tSHAPE A\tSHAPE B\tCHANGED\tMAX ABS\tMAX REL")
	for _, t := range d.Tensors {
		fmt.Fprintf(tw, "  %s\t%s\t%v\t%v\t%d\t%.3g\t%.3g\n", t.Name, t.Change, t.ShapeA, t.ShapeB, t.Changed, t.MaxAbs, t.MaxRel)
	}
	tw.Flush()
	fmt.Fprintf(w, "\nvocabulary: %d vs %d ids, %d row(s) hold a different id\n", d.Vocabulary.LenA, d.Vocabulary.LenB, d.Vocabulary.RowsDiffer)
	fmt.Fprintf(w, "\nstats: %d difference(s)\n", len(d.Stats))
	for _, c := range d.Stats {
		fmt.Fprintf(w, "  %s: %s -> %s\n", c.Pointer, orNone(c.A), orNone(c.B))
	}
	probes := "same bytes"
	if d.Probes.Changed {
		probes = "different bytes"
	}
	fmt.Fprintf(w, "\nprobes: %d vs %d rows, %s\n", d.Probes.CountA, d.Probes.CountB, probes)
	fmt.Fprintln(w, "\nfiles:")
	fw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(fw, "  FILE\tCHANGE\tSIZE A\tSIZE B")
	for _, f := range d.Files {
		fmt.Fprintf(fw, "  %s\t%s\t%s\t%s\n", f.Name, f.Change, sizeOrNone(f.SizeA, f.DigestA), sizeOrNone(f.SizeB, f.DigestB))
	}
	fw.Flush()
	return nil
}

func sizeOrNone(n int64, digest string) string {
	if digest == "" {
		return "(none)"
	}
	return report.HumanBytes(n)
}

func orNone(b []byte) string {
	if len(b) == 0 {
		return "(none)"
	}
	return string(b)
}

func newVerifyCmd(g *globals) *cobra.Command {
	return &cobra.Command{
		Use:   "verify [NAME...]",
		Short: "Check the store: digests, manifests, specs, tensors, tags",
		Long: `verify re-hashes every blob, checks every manifest and spec against its
schema, every tensor against its spec (shape, dtype, NaN/Inf), and every
tag, of the whole store or of the repositories NAME... (a registry that
does not list its repositories needs them named). Unreferenced blobs (left
by an interrupted push) are reported as hints when the whole store is
verified. Exits 5 when anything is damaged.`,
		RunE: func(cmd *cobra.Command, args []string) error {
			return runVerify(cmd.Context(), g, args)
		},
	}
}

func runVerify(ctx context.Context, g *globals, names []string) error {
	store, err := g.openStoreDirect() // the store's own bytes, not the cache's
	if err != nil {
		return err
	}
	var rep *artifact.VerifyReport
	if len(names) > 0 {
		rep, err = artifact.VerifyRepositories(ctx, store, names, g.progress())
	} else {
		rep, err = artifact.VerifyStore(ctx, store, g.progress())
		if errors.Is(err, registry.ErrNoCatalog) {
			return noCatalogErr(err, "verify NAME...")
		}
	}
	if err != nil {
		return err
	}
	if g.JSON {
		if err := g.printJSON(rep); err != nil {
			return err
		}
	} else {
		for _, f := range rep.Findings {
			fmt.Fprintf(g.Stdout, "%-6s %s: %s\n", f.Severity, f.Where, f.Message)
		}
		fmt.Fprintf(g.Stdout, "%s: %d repositories, %d tags, %d manifests (%d models): %d damaged, %d hint(s)\n",
			rep.Store, rep.Repositories, rep.Tags, rep.Manifests, rep.Models, rep.Damage, rep.Hints)
	}
	if !rep.OK() {
		return errkind.New(errkind.Integrity, "store %s is damaged: %d finding(s)", rep.Store, rep.Damage)
	}
	return nil
}

// noCatalogErr explains a store that cannot list its repositories to a
// command that wanted all of them, keeping err's kind (bad input, or not
// authorised when the catalog is limited to other accounts).
func noCatalogErr(err error, usage string) error {
	return errkind.Wrap(errkind.Of(err), fmt.Errorf("%w\n  name a repository instead: modelgate %s", err, usage))
}

// printReferrers lists the reports, approvals and records about d.
func printReferrers(w io.Writer, d *artifact.Description) {
	if len(d.Referrers) == 0 {
		fmt.Fprintln(w, "\nreports, approvals and records: none")
		return
	}
	fmt.Fprintln(w, "\nreports, approvals and records:")
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "  KIND\tDIGEST\tFOR\tRESULT\tSIGNED BY\tCREATED")
	for _, r := range d.Referrers {
		result := r.Verdict
		switch {
		case r.Shard != "":
			result = "shard " + r.Shard
		case r.Action != "":
			result = r.Action
		case r.Kind == "approval":
			result = "approves"
		}
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\t%s\t%s\n", r.Kind, shortDigest(r.Digest), dash(r.Target), dash(result), dash(r.Signer), dash(r.Created))
	}
	tw.Flush()
}

func dash(s string) string {
	if s == "" {
		return "-"
	}
	return s
}
