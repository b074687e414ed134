package web

import (
	"context"
	"fmt"
	"net/http"
	"regexp"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/registry"
)

// TestServePages walks the demo store's pages: the tag list, a tag, the
// candidate list, a candidate, its gate report and an artifact.
func TestServePages(t *testing.T) {
	f := demoStore(t)
	s := newServer(t, f.store, Options{Policies: nil, StoreFlag: "/srv/store"})

	home := mustGet(t, s, "/")
	for _, want := range []string{
		`href="/tags/promo-scorer:prod"`, `href="/tags/listener-encoder:prod"`,
		`href="/artifacts/promo-scorer@` + f.baseline + `"`,
		"<strong>4</strong> candidates with a gate report are waiting",
		"target's creation time; no release log",
	} {
		if !strings.Contains(home, want) {
			t.Errorf("tag list lacks %q", want)
		}
	}

	tag := mustGet(t, s, "/tags/promo-scorer:prod")
	for _, want := range []string{
		f.baseline, "chain verified", "first release of the demo",
		`href="/candidates/promo-scorer@` + f.better + `"`, `href="/candidates/promo-scorer@` + f.worse + `"`,
		"modelgate log promo-scorer:prod --store /srv/store",
	} {
		if !strings.Contains(tag, want) {
			t.Errorf("tag page lacks %q", want)
		}
	}

	// The head release record's page lists its committed marker.
	recPage := mustGet(t, s, "/artifacts/promo-scorer@"+resolveTag(t, f.store, "promo-scorer", "release-prod"))
	if !strings.Contains(recPage, "marks that this release of promo-scorer:prod took effect") {
		t.Error("the release record's page does not show its committed marker")
	}

	// The production tags' policies are bound by their release logs, so
	// the view knows them without --policy.
	list := mustGet(t, s, "/candidates")
	if n := strings.Count(list, `<span class="muted">policy unknown</span>`); n != 0 {
		t.Errorf("candidate list shows %d candidates with an unknown policy, want 0", n)
	}

	// The candidate that passes: verdict, report link, the next commands.
	better := mustGet(t, s, "/candidates/promo-scorer@"+f.better)
	for _, want := range []string{
		`<span aria-hidden="true">✓</span> PASS`,
		`href="/reports/promo-scorer@` + f.reports[f.better] + `"`,
		"bound to the tag by its release log", `<strong class="count">1 of 2</strong>`,
		"modelgate approve promo-scorer@" + f.better + " --to promo-scorer:prod --key YOUR.key.pem --store /srv/store",
	} {
		if !strings.Contains(better, want) {
			t.Errorf("passing candidate's page lacks %q", want)
		}
	}
	// The one that fails: verdict, reasons, and only the gate command.
	worse := mustGet(t, s, "/candidates/promo-scorer@"+f.worse)
	for _, want := range []string{`<span aria-hidden="true">✗</span> FAIL`, "holdout", "modelgate gate promo-scorer@" + f.worse} {
		if !strings.Contains(worse, want) {
			t.Errorf("failing candidate's page lacks %q", want)
		}
	}
	if strings.Contains(worse, "modelgate approve") || strings.Contains(worse, "modelgate promote") {
		t.Error("failing candidate's page offers to approve or promote it")
	}

	// With the policy the candidates were gated under.
	sp := newServer(t, f.store, Options{Policies: nil})
	sp.opts.Policies = append(sp.opts.Policies, f.policy)
	better = mustGet(t, sp, "/candidates/promo-scorer@"+f.better)
	for _, want := range []string{
		`<strong class="count">1 of 2</strong>`, "no approval yet from sam",
		"rita (" + f.keys["rita"].ID + ")", "slices read; fine by me",
		"mallory", "which the policy does not list as an approver",
	} {
		if !strings.Contains(better, want) {
			t.Errorf("with the policy, the candidate page lacks %q", want)
		}
	}

	rep := get(t, s, "/reports/promo-scorer@"+f.reports[f.better])
	if rep.status != http.StatusOK {
		t.Fatalf("report page: %d %s", rep.status, rep.body)
	}
	if n := strings.Count(rep.body, "<svg"); n < 3 {
		t.Errorf("report page has %d plots", n)
	}
	if !strings.Contains(rep.body, `href="/candidates/promo-scorer@`+f.better+`"`) {
		t.Error("report page has no link back to its candidate")
	}

	art := mustGet(t, s, "/artifacts/promo-scorer@"+f.better)
	for _, want := range []string{
		"Layers", "concat", "Lineage", `<th scope="row">encoder</th><td><a href="/artifacts/listener-encoder@`,
		"training data", "Referrers", "gate report: pass for promo-scorer:prod",
		"promo-scorer:cand-better",
	} {
		if !strings.Contains(art, want) {
			t.Errorf("artifact page lacks %q", want)
		}
	}
	repo := mustGet(t, s, "/repositories/promo-scorer")
	if !strings.Contains(repo, f.reports[f.worse][:19]) {
		t.Error("repository page does not list the failing report")
	}
	if hold := mustGet(t, s, "/tags/promo-holdout:v1"); !strings.Contains(hold, "holdout") {
		t.Error("holdout tag page does not say it is a holdout")
	}

	// listener-encoder v2 was promoted and rolled back: its page says so,
	// with the reason, and offers only to gate it again.
	v2 := resolveTag(t, f.store, "listener-encoder", "v2")
	page := mustGet(t, s, "/candidates/listener-encoder@"+v2)
	for _, want := range []string{"Rolled back:", "canary: fewer subscriptions; back to v1 and its scorer",
		"promote would refuse it now"} {
		if !strings.Contains(page, want) {
			t.Errorf("rolled-back candidate's page lacks %q", want)
		}
	}
	if !strings.Contains(list, `<span aria-hidden="true">↶</span> rolled back</span> <span class="note">canary: fewer subscriptions; back to v1 and its scorer`) {
		t.Error("the candidate list does not show listener-encoder v2 as rolled back, with the reason")
	}
	if strings.Contains(page, "ready to promote") || strings.Contains(page, "modelgate promote") {
		t.Error("the rolled-back candidate's page offers to promote it")
	}
}

// TestServeHeaders: every answer carries the security headers; no page
// has a script or an inline style; the style sheet is served.
func TestServeHeaders(t *testing.T) {
	f := demoStore(t)
	s := newServer(t, f.store, Options{})
	for _, path := range []string{"/", "/candidates", "/tags/promo-scorer:prod", "/candidates/promo-scorer@" + f.better,
		"/artifacts/promo-scorer@" + f.better, "/repositories/promo-scorer", "/nope", "/artifacts/promo-scorer@sha256:" + strings.Repeat("0", 64)} {
		r := get(t, s, path)
		if got := r.header.Get("Content-Security-Policy"); got != pageCSP {
			t.Errorf("%s: CSP %q", path, got)
		}
		if r.header.Get("X-Content-Type-Options") != "nosniff" || r.header.Get("X-Frame-Options") != "DENY" {
			t.Errorf("%s: headers %v", path, r.header)
		}
		if !strings.HasPrefix(r.header.Get("Content-Type"), "text/html") {
			t.Errorf("%s: content type %q", path, r.header.Get("Content-Type"))
		}
		low := strings.ToLower(r.body)
		for _, bad := range []string{"<script", " style=", "<style", "javascript:", " on"} {
			if bad == " on" {
				if regexp.MustCompile(`<[^>]+\son[a-z]+=`).MatchString(low) {
					t.Errorf("%s: an event handler attribute", path)
				}
				continue
			}
			if strings.Contains(low, bad) {
				t.Errorf("%s: page contains %q", path, bad)
			}
		}
		if !strings.Contains(r.body, `<a class="skip" href="#main">`) || !strings.Contains(r.body, `<main id="main"`) {
			t.Errorf("%s: no skip link to the main content", path)
		}
	}
	css := get(t, s, "/static/style.css")
	if css.status != 200 || !strings.HasPrefix(css.header.Get("Content-Type"), "text/css") || !strings.Contains(css.body, ":focus-visible") {
		t.Errorf("style sheet: %d %q", css.status, css.header.Get("Content-Type"))
	}
}

// TestServeReportCSP: the report page's policy lists the hash of its style
// element and of each distinct style attribute, and nothing else inline.
func TestServeReportCSP(t *testing.T) {
	f := demoStore(t)
	s := newServer(t, f.store, Options{})
	r := get(t, s, "/reports/promo-scorer@"+f.reports[f.worse])
	csp := r.header.Get("Content-Security-Policy")
	want, err := styleHashes([]byte(r.body))
	if err != nil {
		t.Fatal(err)
	}
	attrs := map[string]bool{}
	for _, m := range regexp.MustCompile(`\sstyle="([^"]*)"`).FindAllStringSubmatch(r.body, -1) {
		attrs[m[1]] = true
	}
	// One hash per distinct style attribute value plus the style element.
	if len(want) != len(attrs)+1 {
		t.Errorf("%d hashes for %d distinct style attributes and one style element", len(want), len(attrs))
	}
	for _, h := range want {
		if !strings.Contains(csp, "'"+h+"'") {
			t.Errorf("CSP lacks %s", h)
		}
	}
	for _, d := range []string{"default-src 'none'", "'unsafe-hashes'", "font-src data:", "img-src data:", "frame-ancestors 'none'"} {
		if !strings.Contains(csp, d) {
			t.Errorf("CSP %q lacks %q", csp, d)
		}
	}
	if strings.Contains(csp, "unsafe-inline") || strings.Contains(csp, "script-src") {
		t.Errorf("CSP allows too much: %q", csp)
	}
}

// TestServeErrors: malformed references are 400, unknown ones 404, other
// methods 405; nothing answers 500.
func TestServeErrors(t *testing.T) {
	f := demoStore(t)
	s := newServer(t, f.store, Options{})
	zero := "sha256:" + strings.Repeat("0", 64)
	cases := []struct {
		method, path string
		status       int
	}{
		{"GET", "/artifacts/promo-scorer@" + zero, 404},
		{"GET", "/artifacts/no-such-repo@" + zero, 404},
		{"GET", "/candidates/promo-scorer@" + zero, 404},
		{"GET", "/reports/promo-scorer@" + zero, 404},
		{"GET", "/reports/promo-scorer@" + f.better, 404}, // a model, not a report
		{"GET", "/candidates/promo-holdout@" + mustResolve(t, f, "promo-holdout", "v1"), 404},
		{"GET", "/tags/promo-scorer:no-such-tag", 404},
		{"GET", "/tags/no-such-repo:prod", 404},
		{"GET", "/repositories/no-such-repo", 404},
		{"GET", "/nope", 404},
		{"GET", "/static/", 404},
		{"GET", "/artifacts/promo-scorer@sha256:xyz", 400},
		{"GET", "/artifacts/promo-scorer@sha256:" + strings.Repeat("A", 64), 400},
		{"GET", "/artifacts/Promo-Scorer@" + zero, 400},
		{"GET", "/artifacts/promo-scorer", 400},
		{"GET", "/reports/promo-scorer@md5:abc", 400},
		{"GET", "/tags/promo-scorer", 400},
		{"GET", "/tags/promo-scorer@" + zero, 400},
		{"GET", "/artifacts?repository=promo-scorer&digest=nope", 400},
		{"GET", "/artifacts?repository=promo-scorer&digest=" + f.better, 303},
		{"GET", "/artifacts/promo-scorer:cand-better", 303},
		{"GET", "/artifacts/promo-scorer:cand-better@" + f.better, 303},
		{"HEAD", "/", 200},
		{"HEAD", "/artifacts/promo-scorer@" + zero, 404},
		{"POST", "/", 405},
		{"PUT", "/artifacts/promo-scorer@" + f.better, 405},
		{"DELETE", "/tags/promo-scorer:prod", 405},
		{"PATCH", "/candidates", 405},
		{"OPTIONS", "/", 405},
	}
	for _, c := range cases {
		r := do(t, s, c.method, c.path)
		if r.status != c.status {
			t.Errorf("%s %s: %d, want %d\n%s", c.method, c.path, r.status, c.status, r.body)
		}
		if c.status == 405 && r.header.Get("Allow") != "GET, HEAD" {
			t.Errorf("%s %s: Allow %q", c.method, c.path, r.header.Get("Allow"))
		}
		if c.method == "HEAD" && r.body != "" {
			t.Errorf("HEAD %s has a body", c.path)
		}
	}
	// Dot segments are cleaned by a redirect inside the site, never
	// followed to a file: no file of the machine is served.
	for _, p := range []string{"/static/../../go.mod", "/static/..%2f..%2fgo.mod", "/repositories/..", "/artifacts/../../../etc/passwd", "/reports/..%2F..%2Fetc%2Fpasswd"} {
		r := get(t, s, p)
		for hops := 0; r.status/100 == 3 && hops < 5; hops++ {
			loc := r.header.Get("Location")
			if !strings.HasPrefix(loc, "/") || strings.HasPrefix(loc, "//") || strings.Contains(loc, "..") {
				t.Errorf("%s redirects to %q", p, loc)
				break
			}
			r = get(t, s, loc)
		}
		if strings.Contains(r.body, "module modelgate") || strings.Contains(r.body, "root:") {
			t.Errorf("%s served a file of the machine", p)
		}
		if r.status != 200 && r.status != 400 && r.status != 404 {
			t.Errorf("%s ends with %d", p, r.status)
		}
	}
	r := get(t, s, "/artifacts/promo-scorer:cand-better")
	if loc := r.header.Get("Location"); loc != "/artifacts/promo-scorer@"+f.better {
		t.Errorf("tag reference redirects to %q", loc)
	}
}

// TestServeReadOnly: no request changes the store, whatever its method.
func TestServeReadOnly(t *testing.T) {
	f := demoStore(t)
	before := storeState(t, f)
	s := newServer(t, f.store, Options{})
	for _, m := range []string{"GET", "HEAD", "POST", "PUT", "DELETE", "PATCH"} {
		for _, p := range []string{"/", "/candidates", "/tags/promo-scorer:prod", "/candidates/promo-scorer@" + f.better,
			"/reports/promo-scorer@" + f.reports[f.better], "/artifacts/promo-scorer@" + f.better} {
			do(t, s, m, p)
		}
	}
	if after := storeState(t, f); after != before {
		t.Errorf("the store changed:\nbefore %s\nafter  %s", before, after)
	}
}

// TestServeHostCheck: a loopback server refuses requests for other host
// names (DNS rebinding).
func TestServeHostCheck(t *testing.T) {
	f := demoStore(t)
	s := newServer(t, f.store, Options{AllowedHosts: LoopbackHosts})
	for host, want := range map[string]int{"127.0.0.1:8080": 200, "localhost": 200, "[::1]:9": 200, "evil.example:8080": 421, "127.0.0.1.nip.example": 421} {
		req, _ := http.NewRequest("GET", "/", nil)
		req.Host = host
		rec := newRecorder()
		s.ServeHTTP(rec, req)
		if rec.Code != want {
			t.Errorf("Host %s: %d, want %d", host, rec.Code, want)
		}
	}
}

func resolveTag(t *testing.T, s *registry.Local, repo, tag string) string {
	t.Helper()
	d, err := s.Resolve(context.Background(), repo, tag)
	if err != nil {
		t.Fatal(err)
	}
	return d.Digest.String()
}

// noCatalog is the demo store seen through a registry that does not list
// its repositories (its catalog endpoint off, as on many hosted ones).
type noCatalog struct{ registry.Store }

func (noCatalog) Repositories(context.Context) ([]string, error) {
	return nil, fmt.Errorf("%w: catalog switched off", registry.ErrNoCatalog)
}

// TestServeWithoutCatalog: on a registry without a catalog the tag list
// does not fail; it says why it cannot list everything and shows the
// repositories the policies name, with their tags.
func TestServeWithoutCatalog(t *testing.T) {
	f := demoStore(t)
	bare := mustGet(t, newServer(t, noCatalog{f.store}, Options{}), "/")
	for _, want := range []string{"This registry does not list its repositories", "the policies name none"} {
		if !strings.Contains(bare, want) {
			t.Errorf("tag list without policies lacks %q", want)
		}
	}
	s := newServer(t, noCatalog{f.store}, Options{})
	s.opts.Policies = append(s.opts.Policies, f.policy)
	home := mustGet(t, s, "/")
	for _, want := range []string{"This registry does not list its repositories", `href="/tags/promo-scorer:prod"`, `<a href="/repositories/promo-scorer">promo-scorer</a>`} {
		if !strings.Contains(home, want) {
			t.Errorf("tag list with the policy lacks %q", want)
		}
	}
}
