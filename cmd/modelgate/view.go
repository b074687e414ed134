package main

import (
	"context"
	"errors"
	"fmt"
	"log"
	"net"
	"net/http"
	"os"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
	"github.com/modelgate/modelgate/internal/web"
)

type viewOptions struct {
	Addr     string
	Policies []string
	Public   bool

	// onListen, when set (tests), is told the address once listening.
	onListen func(net.Addr)
}

func (o *viewOptions) AddFlags(cmd *cobra.Command) {
	f := cmd.Flags()
	f.StringVar(&o.Addr, "addr", "127.0.0.1:8080", "address to listen on, HOST:PORT (loopback unless --public)")
	f.StringArrayVar(&o.Policies, "policy", nil, "policy file whose approval requirements the pages show (repeatable; a target no policy covers shows \"policy unknown\")")
	f.BoolVar(&o.Public, "public", false, "allow a non-loopback address: anyone who reaches it reads the store, without authentication")
}

func newViewCmd(g *globals) *cobra.Command {
	o := &viewOptions{}
	cmd := &cobra.Command{
		Use:   "view [--addr 127.0.0.1:8080] [--policy FILE ...]",
		Short: "Open a read-only web view of the store for release managers",
		Long: `view answers web requests with a read-only view of the store: every tag
with what it points at, when it moved, by whom, and its release log (the
chain verified, a broken one shown as such); the candidates that have a
gate report for a tag and are not promoted yet, with their verdict, their
approvals so far against the policy's requirement (give the policies with
--policy) and the full gate report with its plots; and a page for any
artifact: spec, layers, lineage and referrers. It runs no model and
answers no prediction requests.

Nothing it answers changes the store: where an action is needed, a page
shows the command to run (approvals are signed on the approver's own
machine). Pages need no JavaScript.

It listens on the loopback interface unless --public is given; there is no
authentication, so --public shows the store to anyone who can reach the
address. Stop it with Ctrl-C.

Exit codes: 0 stopped; 2 bad input (address, policy file).`,
		Args: exactArgs(0, "(none)"),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runView(cmd.Context(), g, o)
		},
	}
	o.AddFlags(cmd)
	return cmd
}

// newServeAliasCmd keeps the web view's earlier name working for one
// release: hidden from help, it says the new name on stderr (even with
// --quiet, so scripts get to hear of it) and runs view.
func newServeAliasCmd(g *globals) *cobra.Command {
	cmd := newViewCmd(g)
	cmd.Use = "serve [--addr 127.0.0.1:8080] [--policy FILE ...]"
	cmd.Short = "Former name of view (kept for one release)"
	cmd.Hidden = true
	run := cmd.RunE
	cmd.RunE = func(c *cobra.Command, args []string) error {
		fmt.Fprintln(g.Stderr, "modelgate: `serve` is now `modelgate view` (the read-only web view); the old name goes away in the next release")
		return run(c, args)
	}
	return cmd
}

// loopbackHost reports whether host names the loopback interface.
func loopbackHost(host string) bool {
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

func runView(ctx context.Context, g *globals, o *viewOptions) error {
	host, _, err := net.SplitHostPort(o.Addr)
	if err != nil {
		return usageErr("--addr %q: want HOST:PORT, e.g. 127.0.0.1:8080", o.Addr)
	}
	loopback := loopbackHost(host)
	if !loopback && !o.Public {
		return usageErr("--addr %s is not a loopback address and the view has no authentication: add --public to serve it on the network anyway", o.Addr)
	}
	opts := web.Options{Logf: func(format string, args ...any) {
		fmt.Fprintf(g.Stderr, "modelgate view: "+format+"\n", args...)
	}}
	for _, p := range o.Policies {
		pol, err := policy.Load(p)
		if err != nil {
			return err
		}
		opts.Policies = append(opts.Policies, pol)
	}
	if g.Store != "" || os.Getenv(EnvStore) != "" {
		if opts.StoreFlag, err = g.storeLocation(); err != nil {
			return err
		}
	}
	if loopback {
		opts.AllowedHosts = append(append([]string(nil), web.LoopbackHosts...), host)
	}
	store, err := g.openStore()
	if err != nil {
		return err
	}
	if loc, _ := g.storeLocation(); !isLocalLocation(loc) {
		// A remote store's manifests and small blobs are read once and
		// kept in memory (content addressed: they cannot go stale), so a
		// page seen again costs its tag lookups only. A blob damaged in
		// the store after the view read it shows once the view restarts
		// (verify always reads the store).
		store = registry.NewMemo(store, 64<<20)
	}
	view, err := web.New(store, opts)
	if err != nil {
		return err
	}
	var lc net.ListenConfig
	ln, err := lc.Listen(ctx, "tcp", o.Addr)
	if err != nil {
		return usageErr("listening on %s: %v", o.Addr, err)
	}
	srv := &http.Server{
		Handler:           view,
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       30 * time.Second,
		WriteTimeout:      5 * time.Minute,
		IdleTimeout:       2 * time.Minute,
		MaxHeaderBytes:    64 << 10,
		ErrorLog:          log.New(g.Stderr, "modelgate view: ", 0),
	}
	if o.Public {
		// A warning that --quiet does not silence.
		fmt.Fprintf(g.Stderr, "modelgate: warning: serving %s on %s to the network WITHOUT AUTHENTICATION: anyone who can reach it reads every artifact, report and approval\n", store, ln.Addr())
	}
	g.logf("serving a read-only view of %s on http://%s/ (Ctrl-C stops)", store, ln.Addr())
	if o.onListen != nil {
		o.onListen(ln.Addr())
	}
	done := make(chan error, 1)
	go func() { done <- srv.Serve(ln) }()
	select {
	case err := <-done:
		return fmt.Errorf("serving on %s: %w", ln.Addr(), err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	if err := srv.Shutdown(sctx); err != nil {
		srv.Close()
	}
	if err := <-done; err != nil && !errors.Is(err, http.ErrServerClosed) {
		return err
	}
	g.logf("stopped")
	return nil
}
