package web

import (
	"embed"
	"fmt"
	"html/template"
	"io"
	"io/fs"
	"net/http"
	"strconv"
	"strings"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/release"
	"github.com/modelgate/modelgate/internal/report"
)

//go:embed templates/*.html
var templateFS embed.FS

//go:embed static/style.css
var styleCSS []byte

// templates holds one template set per page, each the layout plus the
// page's own "content".
type templates struct {
	sets map[string]*template.Template
}

var funcs = template.FuncMap{
	"short":         shortDigest,
	"artifactHref":  artifactHref,
	"tagHref":       tagHref,
	"repoHref":      repoHref,
	"candidateHref": candidateHref,
	"reportHref":    reportHref,
	"verdictClass":  verdictClass,
	"verdictMark":   verdictMark,
	"statusClass":   statusClass,
	"statusMark":    checks.StatusMark,
	"bytes":         report.HumanBytes,
	"num":           func(v int64) string { return groupDigits(v) },
	"join":          strings.Join,
	"lastRollback":  lastRollback,
	"inc":           func(i int) int { return i + 1 },
}

func parseTemplates() (*templates, error) {
	layout, err := template.New("layout.html").Funcs(funcs).ParseFS(templateFS, "templates/layout.html", "templates/partials.html")
	if err != nil {
		return nil, fmt.Errorf("parsing the page layout: %w", err)
	}
	names, err := fs.Glob(templateFS, "templates/*.html")
	if err != nil {
		return nil, err
	}
	t := &templates{sets: map[string]*template.Template{}}
	for _, n := range names {
		base := strings.TrimSuffix(strings.TrimPrefix(n, "templates/"), ".html")
		if base == "layout" || base == "partials" {
			continue
		}
		c, err := layout.Clone()
		if err != nil {
			return nil, err
		}
		if _, err := c.ParseFS(templateFS, n); err != nil {
			return nil, fmt.Errorf("parsing page %s: %w", base, err)
		}
		t.sets[base] = c
	}
	return t, nil
}

// layoutData is what the layout template sees.
type layoutData struct {
	Title   string
	Section string
	Store   string
	Crumbs  []crumb
	Page    any
}

func (t *templates) execute(w io.Writer, v *view, store string) error {
	set, ok := t.sets[v.name]
	if !ok {
		return fmt.Errorf("no page template %q", v.name)
	}
	return set.ExecuteTemplate(w, "layout.html", layoutData{Title: v.title, Section: v.section, Store: store, Crumbs: v.crumbs, Page: v.data})
}

func serveStyle(w http.ResponseWriter, r *http.Request) {
	h := w.Header()
	h.Set("Content-Type", "text/css; charset=utf-8")
	h.Set("Content-Length", strconv.Itoa(len(styleCSS)))
	h.Set("Cache-Control", "no-cache")
	if r.Method != http.MethodHead {
		w.Write(styleCSS)
	}
}

// shortDigest shortens sha256:<64 hex> to its first 12 hex digits.
func shortDigest(d string) string {
	if strings.HasPrefix(d, "sha256:") && len(d) > 19 {
		return d[:19] + "…"
	}
	return d
}

func artifactHref(repo, digest string) string { return "/artifacts/" + repo + "@" + digest }
func candidateHref(repo, digest string) string {
	return "/candidates/" + repo + "@" + digest
}
func reportHref(repo, digest string) string { return "/reports/" + repo + "@" + digest }
func tagHref(target string) string          { return "/tags/" + target }
func repoHref(repo string) string           { return "/repositories/" + repo }

func verdictClass(v string) string {
	switch v {
	case checks.VerdictPass:
		return "ok"
	case checks.VerdictFail:
		return "bad"
	}
	return "other"
}

func verdictMark(v string) string {
	switch v {
	case checks.VerdictPass:
		return "✓"
	case checks.VerdictFail:
		return "✗"
	}
	return "?"
}

func statusClass(s string) string {
	switch s {
	case checks.StatusPass:
		return "ok"
	case checks.StatusFail:
		return "bad"
	case checks.StatusWarn:
		return "warn"
	}
	return "other"
}

// groupDigits writes 1234567 as 1 234 567 (thin spaces would not survive
// every font; a plain space reads well in tables).
func groupDigits(v int64) string {
	s := strconv.FormatInt(v, 10)
	neg := strings.HasPrefix(s, "-")
	s = strings.TrimPrefix(s, "-")
	var b strings.Builder
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(' ')
		}
		b.WriteRune(c)
	}
	if neg {
		return "-" + b.String()
	}
	return b.String()
}

// lastRollback returns the newest of a candidate's rollbacks, nil when
// none.
func lastRollback(rb []release.EndedRelease) *release.EndedRelease {
	if len(rb) == 0 {
		return nil
	}
	return &rb[len(rb)-1]
}
