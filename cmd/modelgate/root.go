package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"runtime/pprof"
	"strings"

	"github.com/spf13/cobra"
	"golang.org/x/term"

	"modelgate/internal/errkind"
	"modelgate/internal/registry"
	"modelgate/internal/version"
)

// globals are the flags every command shares, and where output goes.
type globals struct {
	Store  string
	JSON   bool
	Quiet  bool
	Stdout io.Writer
	Stderr io.Writer
	Stdin  io.Reader

	CPUProfile  string
	stopProfile func()
}

// EnvStore names the environment variable that selects the store.
const EnvStore = "MODELGATE_STORE"

// defaultStoreDir is the embedded default store: a local OCI image layout
// under the user's data directory ($XDG_DATA_HOME/modelgate/store, else
// ~/.local/share/modelgate/store).
func defaultStoreDir() (string, error) {
	if d := os.Getenv("XDG_DATA_HOME"); d != "" {
		return filepath.Join(d, "modelgate", "store"), nil
	}
	home, err := os.UserHomeDir()
	if err != nil {
		return "", fmt.Errorf("no home directory for the default store (set --store or %s): %w", EnvStore, err)
	}
	return filepath.Join(home, ".local", "share", "modelgate", "store"), nil
}

// storeLocation returns the store chosen by --store, then MODELGATE_STORE,
// then the default.
func (g *globals) storeLocation() (string, error) {
	if g.Store != "" {
		return g.Store, nil
	}
	if s := os.Getenv(EnvStore); s != "" {
		return s, nil
	}
	return defaultStoreDir()
}

func (g *globals) openStore() (registry.Store, error) {
	loc, err := g.storeLocation()
	if err != nil {
		return nil, err
	}
	return openLocation(loc) // copy.go: local directory, registry or GCS
}

// interactive reports whether progress may be drawn on stderr.
func (g *globals) interactive() bool {
	if g.Quiet || g.JSON {
		return false
	}
	f, ok := g.Stderr.(*os.File)
	return ok && term.IsTerminal(int(f.Fd()))
}

func (g *globals) printJSON(v any) error {
	enc := json.NewEncoder(g.Stdout)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}

func (g *globals) logf(format string, args ...any) {
	if g.Quiet {
		return
	}
	fmt.Fprintf(g.Stderr, format+"\n", args...)
}

func newRoot(g *globals) *cobra.Command {
	root := &cobra.Command{
		Use:   "modelgate",
		Short: "Version encoder and scorer models as OCI artifacts and gate their promotion",
		Long: `modelgate stores encoder and scorer models as OCI artifacts, content-addressed,
with their lineage, and decides from numbers it computes itself whether a
candidate may replace what a tag serves now.

The store is --store, else $` + EnvStore + `, else a local OCI image layout in
$XDG_DATA_HOME/modelgate/store (default ~/.local/share/modelgate/store).

Exit codes: 0 ok or gate passed; 1 gate failed; 2 usage or bad input
(missing or unsuitable files, references or reports); 3 conflict (the tag
moved); 4 not authorised (credentials, signatures, approvals); 5 integrity
(bytes that do not match their digest or signature); 70 internal error (a
bug or an environment failure); 130 / 143 stopped by SIGINT / SIGTERM.`,
		Version:       version.Version,
		SilenceUsage:  true,
		SilenceErrors: true,
	}
	root.SetOut(g.Stdout)
	root.SetErr(g.Stderr)
	root.SetIn(g.Stdin)
	pf := root.PersistentFlags()
	pf.StringVar(&g.Store, "store", "", "store location: a local directory (DIR, file://DIR), an OCI registry (oci://HOST[:PORT]/PREFIX or HOST[:PORT]/PREFIX) or a GCS bucket prefix (gs://BUCKET/PREFIX); default $"+EnvStore+", else the embedded default directory")
	pf.BoolVar(&g.JSON, "json", false, "print machine-readable JSON on stdout")
	pf.BoolVarP(&g.Quiet, "quiet", "q", false, "no progress or log lines on stderr")
	pf.StringVar(&g.CPUProfile, "cpuprofile", "", "write a CPU profile of the command to this file (for performance work)")
	_ = pf.MarkHidden("cpuprofile")
	root.PersistentPreRunE = func(cmd *cobra.Command, args []string) error {
		if g.CPUProfile == "" {
			return nil
		}
		f, err := os.Create(g.CPUProfile)
		if err != nil {
			return errkind.Wrap(errkind.BadInput, err)
		}
		g.stopProfile = func() { pprof.StopCPUProfile(); f.Close() }
		return pprof.StartCPUProfile(f)
	}
	root.AddCommand(
		newPushCmd(g),
		newPullCmd(g),
		newLsCmd(g),
		newShowCmd(g),
		newDiffCmd(g),
		newCopyCmd(g),
		newVerifyCmd(g),
		newScoreCmd(g),
		newDemoCmd(g),
		newGateCmd(g),
		newKeygenCmd(g),
		newApproveCmd(g),
		newPromoteCmd(g),
		newRollbackCmd(g),
		newLogCmd(g),
		newFreezeCmd(g),
		newServeCmd(g),
	)
	root.SetFlagErrorFunc(func(c *cobra.Command, err error) error {
		return errkind.Wrap(errkind.BadInput, err)
	})
	return root
}

// run executes the CLI and returns the process exit code.
func run(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	g := &globals{Stdout: stdout, Stderr: stderr, Stdin: stdin}
	root := newRoot(g)
	root.SetArgs(args)
	err := root.ExecuteContext(ctx)
	if g.stopProfile != nil {
		g.stopProfile()
	}
	if err == nil {
		return 0
	}
	k := errkind.Of(err)
	if k == errkind.Internal && isUsageError(err) {
		k = errkind.BadInput
	}
	if code, ok := interruptCode(ctx); ok {
		// Whatever the command made of its cancelled work, it was stopped.
		fmt.Fprintf(stderr, "modelgate: %v\n", context.Cause(ctx))
		return code
	}
	if errors.Is(err, context.Canceled) {
		fmt.Fprintln(stderr, "modelgate: interrupted")
		return 130
	}
	if !errkind.Is(err, errkind.GateFailed) {
		fmt.Fprintf(stderr, "modelgate: %v\n", err)
	}
	return int(k)
}

// isUsageError recognises cobra's own argument and command errors.
func isUsageError(err error) bool {
	s := err.Error()
	for _, p := range []string{"unknown command", "unknown flag", "unknown shorthand", "accepts ", "requires at least", "requires at most", "invalid argument", "flag needs an argument"} {
		if strings.Contains(s, p) {
			return true
		}
	}
	return false
}

// exactArgs is cobra.ExactArgs with a BadInput kind and a clearer message.
func exactArgs(n int, usage string) cobra.PositionalArgs {
	return func(cmd *cobra.Command, args []string) error {
		if len(args) != n {
			return errkind.New(errkind.BadInput, "%s takes %d argument(s): %s (got %d)", cmd.Name(), n, usage, len(args))
		}
		return nil
	}
}

func parseRef(s string) (registry.Ref, error) { return registry.ParseRef(s, false) }
