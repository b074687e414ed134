package web

import (
	"bytes"
	"context"
	"fmt"
	"image/png"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/cdproto/log"
	"github.com/chromedp/cdproto/page"
	"github.com/chromedp/chromedp"

	"github.com/modelgate/modelgate/internal/policy"
)

// chromiumPath finds Debian's chromium; without it the test fails when CI
// is set and is skipped otherwise.
func chromiumPath(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"/usr/bin/chromium", "chromium"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("CI") != "" {
		t.Fatal("chromium not found (Debian package chromium); CI must install it")
	}
	t.Skip("chromium not found (Debian package chromium)")
	return ""
}

// artifactDir is where screenshots go: $MODELGATE_TEST_ARTIFACTS when set,
// else a temporary directory of the test.
func artifactDir(t *testing.T) string {
	t.Helper()
	if d := os.Getenv("MODELGATE_TEST_ARTIFACTS"); d != "" {
		if err := os.MkdirAll(d, 0o755); err != nil {
			t.Fatal(err)
		}
		return d
	}
	return t.TempDir()
}

// browser starts headless Chromium in a fresh profile, with no network use
// of its own, and collects what it logs.
func browser(t *testing.T) (context.Context, *consoleLog) {
	t.Helper()
	bin := chromiumPath(t)
	opts := append(chromedp.DefaultExecAllocatorOptions[:],
		chromedp.ExecPath(bin),
		chromedp.Headless,
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.NoFirstRun,
		chromedp.Flag("disable-quic", true),
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1280, 900),
	)
	actx, cancelAlloc := chromedp.NewExecAllocator(context.Background(), opts...)
	ctx, cancelCtx := chromedp.NewContext(actx)
	ctx, cancelTime := context.WithTimeout(ctx, 3*time.Minute)
	t.Cleanup(func() { cancelTime(); cancelCtx(); cancelAlloc() })
	if err := chromedp.Do(ctx, chromedp.Navigate("about:blank")); err != nil {
		t.Fatalf("starting chromium: %v", err)
	}
	cl := &consoleLog{}
	entries := chromedp.Events(ctx, log.EntryAdded)
	go func() {
		for ev, err := range entries {
			if err != nil {
				return
			}
			cl.add(fmt.Sprintf("%s %s: %s", ev.Entry.Level, ev.Entry.Source, ev.Entry.Text))
		}
	}()
	return ctx, cl
}

type consoleLog struct {
	mu    sync.Mutex
	lines []string
}

func (c *consoleLog) add(s string) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.lines = append(c.lines, s)
}

func (c *consoleLog) all() []string {
	c.mu.Lock()
	defer c.mu.Unlock()
	return append([]string(nil), c.lines...)
}

// follow clicks the first element sel matches and waits for the page it
// leads to.
func follow(t *testing.T, ctx context.Context, sel string) {
	t.Helper()
	if _, err := chromedp.Run(ctx, chromedp.WaitEvent(page.LoadEventFired, nil, chromedp.Click(chromedp.CSS(sel)))); err != nil {
		t.Fatalf("following %s: %v", sel, err)
	}
}

func eval[T any](t *testing.T, ctx context.Context, js string) T {
	t.Helper()
	v, err := chromedp.Run(ctx, chromedp.Evaluate[T](js))
	if err != nil {
		t.Fatalf("evaluating %s: %v", js, err)
	}
	return v
}

// screenshot saves the whole page as a PNG in dir and checks it is a
// picture of the page's full width.
func screenshot(t *testing.T, ctx context.Context, dir, name string) {
	t.Helper()
	buf, err := chromedp.Run(ctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	img, err := png.Decode(bytes.NewReader(buf))
	if err != nil {
		t.Fatalf("screenshot %s is not a PNG: %v", name, err)
	}
	if b := img.Bounds(); b.Dx() < 1000 || b.Dy() < 500 {
		t.Errorf("screenshot %s is %v", name, b.Size())
	}
	p := filepath.Join(dir, name)
	if err := os.WriteFile(p, buf, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot: %s", p)
}

// lowContrast lists the visible text of the page whose colour against
// its background has a contrast ratio under 4.5:1, computed as WCAG 2.1
// defines it (relative luminance and contrast ratio, success criterion
// 1.4.3, https://www.w3.org/TR/WCAG21/#dfn-contrast-ratio).
const lowContrast = `(() => {
	const parse = c => c.match(/[\d.]+/g).map(Number);
	const lum = c => { const [r, g, b] = parse(c).slice(0, 3).map(v => { v /= 255; return v <= 0.03928 ? v / 12.92 : Math.pow((v + 0.055) / 1.055, 2.4); });
		return 0.2126 * r + 0.7152 * g + 0.0722 * b; };
	const opaque = c => { const p = parse(c); return p.length < 4 || p[3] > 0; };
	const bg = e => { for (; e; e = e.parentElement) { const c = getComputedStyle(e).backgroundColor; if (opaque(c)) return c; } return "rgb(255, 255, 255)"; };
	const bad = [];
	let checked = 0;
	for (const e of document.querySelectorAll("body *")) {
		if (![...e.childNodes].some(n => n.nodeType === 3 && n.textContent.trim())) continue;
		const r = e.getBoundingClientRect();
		if (r.width === 0 || r.height === 0 || r.bottom < 0) continue;
		const l1 = lum(getComputedStyle(e).color), l2 = lum(bg(e));
		const ratio = (Math.max(l1, l2) + 0.05) / (Math.min(l1, l2) + 0.05);
		checked++;
		if (ratio < 4.5) bad.push(e.tagName + " " + ratio.toFixed(2) + ": " + e.textContent.trim().slice(0, 40));
	}
	return {checked: checked, bad: bad};
})()`

type contrast struct {
	Checked int      `json:"checked"`
	Bad     []string `json:"bad"`
}

// checkContrast fails the test for text under 4.5:1 on the current page.
func checkContrast(t *testing.T, ctx context.Context, page string) {
	t.Helper()
	c := eval[contrast](t, ctx, lowContrast)
	if c.Checked < 20 {
		t.Errorf("%s: only %d text elements checked for contrast", page, c.Checked)
	}
	for _, b := range c.Bad {
		t.Errorf("%s: low contrast: %s", page, b)
	}
}

// TestServeChromium drives headless Chromium over the demo store on a
// loopback server: the tag list, a tag's release log, a candidate with its
// verdict and approvals, and its gate report with plots drawn.
func TestServeChromium(t *testing.T) {
	f := demoStore(t)
	s := newServer(t, f.store, Options{Policies: []*policy.Policy{f.policy}, AllowedHosts: LoopbackHosts})
	srv := httptest.NewServer(s) // listens on 127.0.0.1
	defer srv.Close()
	ctx, console := browser(t)
	dir := artifactDir(t)

	// The tag list; the first Tab reaches the skip link, which shows and
	// has a focus ring.
	if err := chromedp.Do(ctx, chromedp.Navigate(srv.URL+"/")); err != nil {
		t.Fatal(err)
	}
	if title := eval[string](t, ctx, `document.title`); title != "Tags · modelgate" {
		t.Errorf("tag list title %q", title)
	}
	if err := chromedp.Do(ctx, chromedp.KeyEvent("\t")); err != nil {
		t.Fatal(err)
	}
	type focus struct {
		Text    string  `json:"text"`
		Top     float64 `json:"top"`
		Outline string  `json:"outline"`
		Width   string  `json:"width"`
	}
	fc := eval[focus](t, ctx, `(() => { const e = document.activeElement; const s = getComputedStyle(e);
		return {text: e.textContent, top: e.getBoundingClientRect().top, outline: s.outlineStyle, width: s.outlineWidth}; })()`)
	if fc.Text != "Skip to main content" || fc.Top < 0 || fc.Outline == "none" || fc.Width == "0px" {
		t.Errorf("first Tab: focus %+v, want the visible skip link with an outline", fc)
	}
	screenshot(t, ctx, dir, "view-tags.png")
	checkContrast(t, ctx, "tag list")

	// A tag and its release log.
	follow(t, ctx, `a[href="/tags/promo-scorer:prod"]`)
	if h1 := eval[string](t, ctx, `document.querySelector("h1").textContent`); !strings.Contains(h1, "promo-scorer:prod") {
		t.Errorf("tag page heading %q", h1)
	}
	logText := eval[string](t, ctx, `document.querySelector("#log-heading").parentElement.textContent`)
	if !strings.Contains(logText, "chain verified") || !strings.Contains(logText, "initial") {
		t.Errorf("release log section: %q", logText)
	}
	if n := eval[int](t, ctx, `document.querySelectorAll("table.log tbody tr").length`); n != 3 {
		t.Errorf("release log has %d rows, want 3 (the first release, the release with encoder v2, its rollback)", n)
	}
	screenshot(t, ctx, dir, "view-tag.png")
	checkContrast(t, ctx, "tag page")

	// The candidate that passes: verdict and approvals.
	follow(t, ctx, `a[href="/candidates/promo-scorer@`+f.better+`"]`)
	verdict := eval[string](t, ctx, `document.querySelector(".verdict .verdict-word").textContent`)
	if !strings.Contains(verdict, "PASS") {
		t.Errorf("verdict %q", verdict)
	}
	approvals := eval[string](t, ctx, `document.querySelector("dd.approvals").textContent`)
	if !strings.Contains(approvals, "1 of 2") {
		t.Errorf("approvals %q, want 1 of 2", approvals)
	}
	screenshot(t, ctx, dir, "view-candidate.png")
	checkContrast(t, ctx, "candidate page")

	// Its full gate report: every plot is drawn with a size, and its
	// lines take the styles the CSP allows by hash.
	follow(t, ctx, `a.full-report`)
	type plots struct {
		N       int     `json:"n"`
		MinW    float64 `json:"minW"`
		MinH    float64 `json:"minH"`
		Styled  int     `json:"styled"`
		Verdict string  `json:"verdict"`
	}
	p := eval[plots](t, ctx, `(() => {
		const svgs = [...document.querySelectorAll("svg.plot")];
		const rects = svgs.map(s => s.getBoundingClientRect());
		const styled = [...document.querySelectorAll("svg.plot path")].filter(e => getComputedStyle(e).stroke === "rgb(31, 90, 166)").length;
		return {n: svgs.length, minW: Math.min(...rects.map(r => r.width)), minH: Math.min(...rects.map(r => r.height)),
			styled: styled, verdict: document.querySelector("#verdict-heading").textContent};
	})()`)
	if p.N < 3 || p.MinW <= 0 || p.MinH <= 0 {
		t.Errorf("report plots: %+v, want 3 or more with a size", p)
	}
	if p.Styled == 0 {
		t.Error("no plot line has the candidate's colour: the style attributes were blocked")
	}
	if !strings.Contains(p.Verdict, "PASS") {
		t.Errorf("report verdict %q", p.Verdict)
	}
	screenshot(t, ctx, dir, "view-report.png")

	// An artifact page, for a look at the lineage and layer table.
	if err := chromedp.Do(ctx, chromedp.Navigate(srv.URL+"/artifacts/promo-scorer@"+f.better)); err != nil {
		t.Fatal(err)
	}
	screenshot(t, ctx, dir, "view-artifact.png")
	checkContrast(t, ctx, "artifact page")
	if err := chromedp.Do(ctx, chromedp.Navigate(srv.URL+"/tags/listener-encoder:prod")); err != nil {
		t.Fatal(err)
	}
	screenshot(t, ctx, dir, "view-encoder-log.png")

	for _, l := range console.all() {
		if strings.Contains(l, "Content Security Policy") || strings.HasPrefix(l, "error") {
			t.Errorf("browser logged: %s", l)
		}
	}
}
