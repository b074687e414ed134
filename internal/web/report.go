package web

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/base64"
	"errors"
	"fmt"
	"html/template"
	"io"
	"net/http"
	"sort"
	"strconv"
	"strings"

	"golang.org/x/net/html"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/report"
)

// pageCSP is the policy of the view's own pages: nothing but the view's
// style sheet and data: images; no script, no frame, forms only to itself.
const pageCSP = "default-src 'none'; style-src 'self'; img-src data:; form-action 'self'; base-uri 'none'; frame-ancestors 'none'"

// reportCSP returns the policy of a rendered gate report page: its inline
// style element and style attributes are allowed by their sha256 hashes
// only (CSP Level 3 'unsafe-hashes' lets a hash match a style attribute),
// its embedded font and images as data: URLs; nothing else.
func reportCSP(page []byte) (string, error) {
	hashes, err := styleHashes(page)
	if err != nil {
		return "", err
	}
	var b strings.Builder
	b.WriteString("default-src 'none'; style-src")
	for _, h := range hashes {
		b.WriteString(" '" + h + "'")
	}
	if len(hashes) > 0 {
		b.WriteString(" 'unsafe-hashes'")
	} else {
		b.WriteString(" 'none'")
	}
	b.WriteString("; font-src data:; img-src data:; form-action 'none'; base-uri 'none'; frame-ancestors 'none'")
	return b.String(), nil
}

// styleHashes returns the distinct CSP hash sources ("sha256-…") of every
// style element's text and every style attribute's value in page, sorted.
func styleHashes(page []byte) ([]string, error) {
	seen := map[string]bool{}
	add := func(s []byte) {
		sum := sha256.Sum256(s)
		seen["sha256-"+base64.StdEncoding.EncodeToString(sum[:])] = true
	}
	z := html.NewTokenizer(bytes.NewReader(page))
	inStyle := false
	for {
		switch z.Next() {
		case html.ErrorToken:
			if z.Err() != io.EOF {
				return nil, fmt.Errorf("reading the report page: %w", z.Err())
			}
			out := make([]string, 0, len(seen))
			for h := range seen {
				out = append(out, h)
			}
			sort.Strings(out)
			return out, nil
		case html.StartTagToken, html.SelfClosingTagToken:
			name, more := z.TagName()
			inStyle = string(name) == "style"
			for more {
				var k, v []byte
				k, v, more = z.TagAttr()
				if string(k) == "style" {
					add(v)
				}
			}
		case html.EndTagToken:
			inStyle = false
		case html.TextToken:
			if inStyle {
				add(z.Text())
			}
		}
	}
}

var backLinks = template.Must(template.New("back").Parse(
	`<nav aria-label="Back to the release view"><p><a href="{{.Candidate}}">← Candidate page for {{.Target}}</a> · <a href="/candidates">All candidates</a> · <a href="/">All tags</a></p></nav>`))

// reportPage serves a stored gate report rendered by report.HTML from its
// JSON, with links back to the view.
func (s *Server) reportPage(w http.ResponseWriter, r *http.Request) {
	ctx, cancel := context.WithTimeout(r.Context(), requestTimeout)
	defer cancel()
	page, err := s.renderReport(ctx, r.PathValue("ref"))
	var rd *redirect
	if errors.As(err, &rd) {
		http.Redirect(w, r, rd.to, http.StatusSeeOther)
		return
	}
	if err != nil {
		s.writeError(w, r, err)
		return
	}
	csp, err := reportCSP(page)
	if err != nil {
		s.writeError(w, r, err)
		return
	}
	h := w.Header()
	h.Set("Content-Security-Policy", csp)
	h.Set("Content-Type", "text/html; charset=utf-8")
	h.Set("Content-Length", strconv.Itoa(len(page)))
	w.WriteHeader(http.StatusOK)
	if r.Method != http.MethodHead {
		w.Write(page)
	}
}

func (s *Server) renderReport(ctx context.Context, raw string) ([]byte, error) {
	ref, err := s.digestRef(ctx, raw, "/reports/")
	if err != nil {
		return nil, err
	}
	a, err := s.read(ctx, ref.Repository, ref.Digest)
	if err != nil {
		return nil, err
	}
	if a.Kind() != "report" || a.Manifest.Config.MediaType != checks.MediaTypeReport {
		return nil, notFoundf("%s is a %s artifact, not a gate report", ref, kindName(a.Kind()))
	}
	rep, err := checks.ReadReport(ctx, s.store, ref.Repository, ref.Digest)
	if err != nil {
		return nil, err
	}
	var page bytes.Buffer
	if err := report.HTML(&page, rep); err != nil {
		return nil, err
	}
	var back bytes.Buffer
	cand := "/candidates"
	if a.Manifest.Subject != nil {
		cand = candidateHref(ref.Repository, a.Manifest.Subject.Digest.String())
	}
	if err := backLinks.Execute(&back, struct{ Candidate, Target string }{cand, rep.Target}); err != nil {
		return nil, err
	}
	out := page.Bytes()
	for _, anchor := range []string{"<main>", "<body>"} {
		if i := bytes.Index(out, []byte(anchor)); i >= 0 {
			i += len(anchor)
			return append(append(append([]byte{}, out[:i]...), back.Bytes()...), out[i:]...), nil
		}
	}
	return append(back.Bytes(), out...), nil
}
