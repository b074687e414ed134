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
	"syscall"
	"time"

	"github.com/spf13/cobra"
	"golang.org/x/term"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/release"
	"github.com/modelgate/modelgate/internal/version"
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

	// With --json, the command's one result document waits here until the
	// command ends (finishJSON), so that a failure can be added to it.
	jsonDoc any
	jsonSet bool

	// Progress off a terminal: the printer, its ticks (nil: a ticker at
	// the progress interval; tests set their own), and what to stop when
	// the command ends.
	plain *plainLines
	ticks <-chan time.Time
	atEnd []func()
}

// end stops what the command started for its progress.
func (g *globals) end() {
	for _, f := range g.atEnd {
		f()
	}
	g.atEnd = nil
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

// openStore opens the store; a registry or GCS store reads its blobs
// through the local blob cache (registry.CacheFromEnv: MODELGATE_CACHE,
// MODELGATE_CACHE_SIZE), a local directory needs none.
func (g *globals) openStore() (registry.Store, error) {
	loc, err := g.storeLocation()
	if err != nil {
		return nil, err
	}
	s, err := openLocation(loc) // copy.go: local directory, registry or GCS
	if err != nil || isLocalLocation(loc) {
		return s, err
	}
	return withCache(s)
}

// openStoreDirect opens the store without the blob cache: verify must
// read the store's own bytes.
func (g *globals) openStoreDirect() (registry.Store, error) {
	loc, err := g.storeLocation()
	if err != nil {
		return nil, err
	}
	return openLocation(loc)
}

// withCache wraps a remote store with the local blob cache, unless it is
// switched off; a cache directory that cannot be made leaves the store
// uncached (the cache saves bytes, it is never needed).
func withCache(s registry.Store) (registry.Store, error) {
	c, err := registry.CacheFromEnv()
	if errkind.Is(err, errkind.BadInput) {
		return nil, err
	}
	if err != nil || c == nil {
		return s, nil
	}
	return registry.NewCached(s, c), nil
}

// interactive reports whether progress may be drawn on stderr.
func (g *globals) interactive() bool {
	if g.Quiet || g.JSON {
		return false
	}
	f, ok := g.Stderr.(*os.File)
	return ok && term.IsTerminal(int(f.Fd()))
}

// printJSON sets the command's result document. With --json it is written
// when the command ends (finishJSON), with the error added when it fails;
// a command sets at most one.
func (g *globals) printJSON(v any) error {
	if !g.JSON {
		return writeJSON(g.Stdout, v)
	}
	if g.jsonSet {
		return errkind.New(errkind.Internal, "a second JSON result document (only one is printed)")
	}
	g.jsonDoc, g.jsonSet = v, true
	return nil
}

func writeJSON(w io.Writer, v any) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}

// jsonError is the "error" member of a failed command's --json document.
type jsonError struct {
	ExitCode int    `json:"exitCode"`
	Kind     string `json:"kind"`
	Message  string `json:"message"`
	// Problems lists each reason of a refusal (promote, approve,
	// rollback), when there are several.
	Problems []string `json:"problems,omitempty"`
}

// finishJSON writes the --json document on stdout: on success the result;
// on failure the result (when the command has one) with an "error" member
// added, else {"error": …}. A result that is not a JSON object is put
// under "result". Without --json it does nothing.
func (g *globals) finishJSON(err error, code int) {
	if !g.JSON {
		return
	}
	if err == nil {
		if g.jsonSet {
			_ = writeJSON(g.Stdout, g.jsonDoc)
		}
		return
	}
	je := jsonError{ExitCode: code, Kind: kindName(code), Message: err.Error()}
	var ref *release.Refusal
	if errors.As(err, &ref) && len(ref.Problems) > 1 {
		je.Problems = ref.Problems
	}
	doc := map[string]any{}
	if g.jsonSet {
		raw, merr := json.Marshal(g.jsonDoc)
		if merr != nil || json.Unmarshal(raw, &doc) != nil {
			doc = map[string]any{"result": json.RawMessage(raw)}
		}
	}
	doc["error"] = je
	_ = writeJSON(g.Stdout, doc)
}

// kindName is the machine name of an exit code in --json errors.
func kindName(code int) string {
	switch errkind.Kind(code) {
	case errkind.GateFailed:
		return "gate-failed"
	case errkind.BadInput:
		return "bad-input"
	case errkind.Conflict:
		return "conflict"
	case errkind.Unauthorized:
		return "unauthorized"
	case errkind.Integrity:
		return "integrity"
	}
	if code == 130 || code == 143 {
		return "interrupted"
	}
	return "internal"
}

// logf writes a log line on stderr: plain text, or with --json a JSON Lines
// event {"event":"log","message":…} so that stderr stays parseable.
func (g *globals) logf(format string, args ...any) {
	if g.Quiet {
		return
	}
	if g.JSON {
		_ = json.NewEncoder(g.Stderr).Encode(map[string]string{"event": "log", "message": fmt.Sprintf(format, args...)})
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
		newReclaimCmd(g),
		newScoreCmd(g),
		newDemoCmd(g),
		newGateCmd(g),
		newKeygenCmd(g),
		newApproveCmd(g),
		newPromoteCmd(g),
		newRollbackCmd(g),
		newUntagCmd(g),
		newLogCmd(g),
		newPolicyCmd(g),
		newFreezeCmd(g),
		newViewCmd(g),
		newServeAliasCmd(g),
	)
	addPolicyScaffold(root, g)
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
	g.end()
	code := exitCode(ctx, err)
	g.finishJSON(err, code)
	if err == nil {
		return 0
	}
	switch {
	case code == 130 || code == 143:
		if cause := context.Cause(ctx); cause != nil && cause != context.Canceled {
			// Whatever the command made of its cancelled work, it was stopped.
			fmt.Fprintf(stderr, "modelgate: %v\n", cause)
		} else {
			fmt.Fprintln(stderr, "modelgate: interrupted")
		}
	case code == int(errkind.GateFailed):
	case g.JSON:
		// The message is in stdout's document; stderr stays JSON Lines.
		_ = json.NewEncoder(stderr).Encode(map[string]any{"event": "error", "exitCode": code, "message": err.Error()})
	default:
		fmt.Fprintf(stderr, "modelgate: %v\n", err)
		if errors.Is(err, syscall.ENOSPC) || errors.Is(err, syscall.EFBIG) {
			fmt.Fprintln(stderr, "modelgate: the store's file system is out of room (disk full or over a file-size limit): free space and run the command again; `modelgate verify` checks the store")
		}
	}
	return code
}

// exitCode maps a command's error to the process exit code.
func exitCode(ctx context.Context, err error) int {
	if err == nil {
		return 0
	}
	if code, ok := interruptCode(ctx); ok {
		return code
	}
	if errors.Is(err, context.Canceled) {
		return 130
	}
	k := errkind.Of(err)
	if k == errkind.Internal && isUsageError(err) {
		k = errkind.BadInput
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
