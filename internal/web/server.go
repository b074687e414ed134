package web

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"net"
	"net/http"
	"strings"
	"time"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
	"github.com/modelgate/modelgate/internal/registry"
)

// Options configure the view.
type Options struct {
	// Policies say, per target tag, how many approvals a promotion needs.
	// A target no policy covers is shown as "policy unknown".
	Policies []*policy.Policy
	// StoreFlag, when not empty, is passed as --store in every CLI command
	// the pages show (the location as the operator gave it).
	StoreFlag string
	// AllowedHosts, when not empty, lists the host names (without port) a
	// request's Host header may carry; others are refused with 421. A
	// loopback server sets it so that a web page elsewhere cannot read it
	// through DNS rebinding.
	AllowedHosts []string
	// Logf receives errors the pages could not turn into a 4xx answer
	// (nil: dropped). The page itself then says only that something failed.
	Logf func(format string, args ...any)
}

// LoopbackHosts are the host names a loopback server answers to.
var LoopbackHosts = []string{"localhost", "127.0.0.1", "::1"}

// Server is the web view of one store. It is an http.Handler safe for
// concurrent use; every request reads the store afresh.
type Server struct {
	store registry.Store
	opts  Options
	mux   *http.ServeMux
	pages *templates
}

// New returns the view of store.
func New(store registry.Store, opts Options) (*Server, error) {
	t, err := parseTemplates()
	if err != nil {
		return nil, err
	}
	s := &Server{store: store, opts: opts, mux: http.NewServeMux(), pages: t}
	s.mux.HandleFunc("/{$}", s.page(s.tagsPage))
	s.mux.HandleFunc("/candidates", s.page(s.candidatesPage))
	s.mux.HandleFunc("/candidates/{ref...}", s.page(s.candidatePage))
	s.mux.HandleFunc("/tags/{ref...}", s.page(s.tagPage))
	s.mux.HandleFunc("/repositories/{repo...}", s.page(s.repositoryPage))
	s.mux.HandleFunc("/artifacts", s.page(s.openArtifact))
	s.mux.HandleFunc("/artifacts/{ref...}", s.page(s.artifactPage))
	s.mux.HandleFunc("/reports/{ref...}", s.reportPage)
	s.mux.HandleFunc("/static/style.css", serveStyle)
	s.mux.HandleFunc("/", s.page(func(r *http.Request) (*view, error) {
		return nil, notFoundf("there is no page %q", r.URL.Path)
	}))
	return s, nil
}

// ServeHTTP answers GET and HEAD (405 for any other method) with security
// headers on every response.
func (s *Server) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	h := w.Header()
	h.Set("Content-Security-Policy", pageCSP)
	h.Set("X-Content-Type-Options", "nosniff")
	h.Set("Referrer-Policy", "no-referrer")
	h.Set("X-Frame-Options", "DENY")
	h.Set("Cross-Origin-Opener-Policy", "same-origin")
	h.Set("Cross-Origin-Resource-Policy", "same-origin")
	h.Set("Cache-Control", "no-store")
	if r.Method != http.MethodGet && r.Method != http.MethodHead {
		h.Set("Allow", "GET, HEAD")
		s.writeError(w, r, &httpError{status: http.StatusMethodNotAllowed,
			msg: fmt.Sprintf("this view is read-only: %s is not allowed, only GET and HEAD", r.Method)})
		return
	}
	if !s.hostAllowed(r.Host) {
		s.writeError(w, r, &httpError{status: http.StatusMisdirectedRequest,
			msg: "this server answers only to its loopback address"})
		return
	}
	s.mux.ServeHTTP(w, r)
}

func (s *Server) hostAllowed(hostport string) bool {
	if len(s.opts.AllowedHosts) == 0 {
		return true
	}
	host := hostport
	if h, _, err := net.SplitHostPort(hostport); err == nil {
		host = h
	}
	host = strings.TrimSuffix(strings.TrimPrefix(host, "["), "]")
	for _, a := range s.opts.AllowedHosts {
		if strings.EqualFold(host, a) {
			return true
		}
	}
	return false
}

// httpError is an error with the HTTP status it answers with.
type httpError struct {
	status int
	msg    string
}

func (e *httpError) Error() string { return e.msg }

func notFoundf(format string, args ...any) error {
	return &httpError{status: http.StatusNotFound, msg: fmt.Sprintf(format, args...)}
}

func badRequestf(format string, args ...any) error {
	return &httpError{status: http.StatusBadRequest, msg: fmt.Sprintf(format, args...)}
}

// redirect is returned by a page to send the browser elsewhere (303).
type redirect struct{ to string }

func (r *redirect) Error() string { return "see " + r.to }

// statusOf maps an error to its HTTP status and the message a page may
// show: missing things are 404, bad input 400, anything else 500 with a
// message that names no detail.
func statusOf(err error) (int, string) {
	var he *httpError
	switch {
	case errors.As(err, &he):
		return he.status, he.msg
	case errors.Is(err, registry.ErrNotFound):
		return http.StatusNotFound, err.Error()
	case errors.Is(err, context.Canceled), errors.Is(err, context.DeadlineExceeded):
		return http.StatusServiceUnavailable, "the request was cancelled or took too long"
	case errkind.Is(err, errkind.BadInput):
		return http.StatusBadRequest, err.Error()
	}
	return http.StatusInternalServerError, "the store could not be read; the server's log says why"
}

// view is what a page handler returns: a template and its data.
type view struct {
	name    string // template name, e.g. "tags"
	title   string
	section string // "tags" or "candidates": the nav entry marked current
	crumbs  []crumb
	data    any
}

type crumb struct {
	Href, Text string
}

// requestTimeout bounds the store reads of one page.
const requestTimeout = 2 * time.Minute

func (s *Server) page(fn func(*http.Request) (*view, error)) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		ctx, cancel := context.WithTimeout(r.Context(), requestTimeout)
		defer cancel()
		// One page asks a store made by registry.NewMemo each tag
		// question once.
		r = r.WithContext(registry.WithRequestMemo(ctx))
		v, err := fn(r)
		var rd *redirect
		if errors.As(err, &rd) {
			http.Redirect(w, r, rd.to, http.StatusSeeOther)
			return
		}
		if err != nil {
			s.writeError(w, r, err)
			return
		}
		s.render(w, r, http.StatusOK, v)
	}
}

func (s *Server) writeError(w http.ResponseWriter, r *http.Request, err error) {
	status, msg := statusOf(err)
	if status >= 500 && s.opts.Logf != nil {
		s.opts.Logf("%s %s: %v", r.Method, r.URL.Path, err)
	}
	s.render(w, r, status, &view{name: "error", title: http.StatusText(status),
		data: errorData{Status: status, Text: http.StatusText(status), Message: msg}})
}

type errorData struct {
	Status  int
	Text    string
	Message string
}

func (s *Server) render(w http.ResponseWriter, r *http.Request, status int, v *view) {
	var buf bytes.Buffer
	if err := s.pages.execute(&buf, v, s.store.String()); err != nil {
		if s.opts.Logf != nil {
			s.opts.Logf("rendering %s: %v", r.URL.Path, err)
		}
		http.Error(w, "the page could not be rendered", http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.WriteHeader(status)
	if r.Method != http.MethodHead {
		w.Write(buf.Bytes())
	}
}
