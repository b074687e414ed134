package main

import (
	"context"
	"errors"
	"io/fs"
	"os"
	"strings"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
	"github.com/modelgate/modelgate/internal/report"
)

// EnvInsecure allows plain HTTP to registries that are not on a loopback
// address when set to 1 (there is no global --insecure flag).
const EnvInsecure = "MODELGATE_INSECURE"

// openLocation opens the store a location names:
//
//	gs://BUCKET/PREFIX             a GCS bucket prefix (Application Default Credentials)
//	oci://HOST[:PORT]/PREFIX       an OCI registry, repositories under PREFIX
//	HOST[:PORT]/PREFIX             the same, when HOST has a '.' or ':' or is localhost,
//	                               and no local path of that name exists
//	file://DIR, DIR                a local directory in OCI image layout
//
// Remote stores are wrapped in the retry wrapper. Registry credentials come
// from MODELGATE_REGISTRY_USER/PASSWORD, else the container tools'
// configuration; plain HTTP is used only for loopback registries unless
// MODELGATE_INSECURE=1.
func openLocation(loc string) (registry.Store, error) {
	switch {
	case strings.HasPrefix(loc, "gs://"):
		s, err := registry.OpenGCS(context.Background(), loc)
		if err != nil {
			return nil, err
		}
		return registry.NewRetry(s, registry.RetryOptions{}), nil
	case strings.HasPrefix(loc, "http://"), strings.HasPrefix(loc, "https://"):
		return nil, errkind.New(errkind.BadInput, "store %q: name a registry as oci://HOST/PREFIX or HOST/PREFIX (plain HTTP is chosen for loopback hosts, or with %s=1)", loc, EnvInsecure)
	case strings.HasPrefix(loc, "oci://"), looksLikeRegistry(loc):
		s, err := registry.OpenRemote(loc, registry.WithInsecure(os.Getenv(EnvInsecure) == "1"))
		if err != nil {
			return nil, err
		}
		return registry.NewRetry(s, registry.RetryOptions{}), nil
	}
	return registry.OpenLocal(strings.TrimPrefix(loc, "file://"))
}

// isLocalLocation reports whether openLocation opens loc as a local
// directory.
func isLocalLocation(loc string) bool {
	switch {
	case strings.HasPrefix(loc, "gs://"), strings.HasPrefix(loc, "oci://"), strings.HasPrefix(loc, "http://"), strings.HasPrefix(loc, "https://"):
		return false
	}
	return !looksLikeRegistry(loc)
}

// looksLikeRegistry applies the container tools' rule for the first
// component of an image name (a domain has a '.' or ':' or is localhost)
// to a location that is not an existing local path.
func looksLikeRegistry(loc string) bool {
	if strings.HasPrefix(loc, "/") || strings.HasPrefix(loc, ".") || strings.HasPrefix(loc, "~") {
		return false
	}
	if _, err := os.Stat(loc); err == nil || !errors.Is(err, fs.ErrNotExist) {
		return false
	}
	host, _, _ := strings.Cut(loc, "/")
	return strings.ContainsAny(host, ".:") || host == "localhost"
}

type copyOptions struct {
	Dest string
	All  bool
}

func (o *copyOptions) AddFlags(cmd *cobra.Command) {
	cmd.Flags().StringVar(&o.Dest, "dest", "", "the store to copy into (same forms as --store)")
	cmd.Flags().BoolVar(&o.All, "all", false, "copy every repository, manifest and tag of the source store")
}

func newCopyCmd(g *globals) *cobra.Command {
	o := &copyOptions{}
	cmd := &cobra.Command{
		Use:   "copy [NAME:TAG|NAME@DIGEST] --dest STORE",
		Short: "Copy artifacts with their referrers between stores, keeping digests",
		Long: `copy copies an artifact from --store to --dest: its blobs, its manifest (the
same bytes, so the same digest), every report, approval and release record
that refers to it (recursively), what it needs (a scorer's encoder, from
its own repository), then its tag. A tag with a release log comes with its
log: its head record, every earlier record and the models they released;
at the destination the tag and its head move by compare-and-swap, and only
forward along the source's log: a destination tag with releases of its own
is refused (exit 4: move it there with promote or rollback). Blobs and
manifests the destination already has are skipped, so an interrupted copy
can be run again. With --all, every repository, manifest and tag is copied.

Stores: a local directory, oci://HOST/PREFIX or HOST/PREFIX (an OCI
registry), gs://BUCKET/PREFIX (Google Cloud Storage).`,
		Args: func(cmd *cobra.Command, args []string) error {
			switch {
			case o.All && len(args) != 0:
				return usageErr("copy --all takes no reference")
			case !o.All && len(args) != 1:
				return usageErr("copy takes one reference NAME:TAG or NAME@DIGEST, or --all")
			}
			return nil
		},
		RunE: func(cmd *cobra.Command, args []string) error {
			return runCopy(cmd.Context(), g, o, args)
		},
	}
	o.AddFlags(cmd)
	return cmd
}

func runCopy(ctx context.Context, g *globals, o *copyOptions, args []string) error {
	if o.Dest == "" {
		return usageErr("copy needs --dest STORE")
	}
	var ref registry.Ref
	if !o.All {
		var err error
		if ref, err = parseRef(args[0]); err != nil {
			return err
		}
	}
	src, err := g.openStore()
	if err != nil {
		return err
	}
	dst, err := openLocation(o.Dest)
	if err != nil {
		return err
	}
	if src.String() == dst.String() {
		return usageErr("--store and --dest are the same store (%s)", src)
	}
	opts := registry.CopyOptions{Progress: copyProgress(g), Needs: release.CopyNeeds, CheckTag: g.tagGuard(dst).Check}
	var res *registry.CopyResult
	if o.All {
		res, err = registry.CopyAll(ctx, src, dst, opts)
		if errors.Is(err, registry.ErrNoCatalog) {
			return noCatalogErr(err, "copy NAME:TAG --dest STORE")
		}
	} else {
		res, err = registry.Copy(ctx, src, dst, ref, opts)
	}
	if err != nil {
		return err
	}
	if g.JSON {
		return g.printJSON(res)
	}
	present := 0
	for _, m := range res.Manifests {
		line := m.Repository + "@" + m.Digest
		if m.Subject != "" {
			line += " (refers to " + m.Subject + ")"
		}
		if m.Present {
			present++
			line += " already there"
		}
		if _, err := g.Stdout.Write([]byte(line + "\n")); err != nil {
			return err
		}
	}
	for _, t := range res.Tags {
		if _, err := g.Stdout.Write([]byte("tag " + t + "\n")); err != nil {
			return err
		}
	}
	g.logf("copied %s → %s: %d manifest(s) (%d already there), %d blob(s) copied (%s), %d already there, %d tag(s)",
		res.Source, res.Destination, len(res.Manifests), present, res.BlobsCopied, report.HumanBytes(res.BytesCopied), res.BlobsSkipped, len(res.Tags))
	return nil
}

// copyProgress adapts copy events to the shared progress bar.
func copyProgress(g *globals) func(registry.CopyEvent) {
	p := g.progress()
	if p == nil {
		return nil
	}
	return func(e registry.CopyEvent) {
		phase := e.Phase
		if phase == "blob" {
			phase = "upload"
		}
		p(artifact.Event{Phase: phase, Name: e.Name, Done: e.Done, Total: e.Total})
	}
}
