package report

import (
	"bytes"
	"encoding/xml"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/vg"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/report/reporttest"
)

var keep = flag.String("keep", "", "write the sample pages into this folder")

func renderHTML(t *testing.T, r *checks.Report) string {
	t.Helper()
	var b bytes.Buffer
	if err := HTML(&b, r); err != nil {
		t.Fatal(err)
	}
	return b.String()
}

var svgRE = regexp.MustCompile(`(?s)<svg\b.*?</svg>`)

// checkPage checks what any rendered page must satisfy: one document,
// no script, no outside reference, every plot drawn and well-formed XML
// with a title.
func checkPage(t *testing.T, html string, wantSVGs int) {
	t.Helper()
	if !strings.HasPrefix(html, "<!DOCTYPE html>") || strings.Count(html, "</html>") != 1 {
		t.Errorf("not one HTML document")
	}
	low := strings.ToLower(html)
	if strings.Contains(low, "<script") {
		t.Errorf("page has a script element")
	}
	for _, ext := range []string{"http://", "https://", "src=", "<link", "@import"} {
		for _, m := range regexp.MustCompile(regexp.QuoteMeta(ext)).FindAllStringIndex(low, -1) {
			ctx := low[max(0, m[0]-40):min(len(low), m[1]+60)]
			// The SVG namespaces are names, not requests.
			if strings.Contains(ctx, "xmlns") {
				continue
			}
			t.Errorf("outside reference %q near %q", ext, ctx)
		}
	}
	if strings.Contains(html, "could not be drawn") {
		t.Errorf("a plot failed: %s", html[strings.Index(html, "could not be drawn"):][:200])
	}
	svgs := svgRE.FindAllString(html, -1)
	if len(svgs) != wantSVGs || strings.Count(html, "<svg") != wantSVGs {
		t.Errorf("%d svg elements, want %d", len(svgs), wantSVGs)
	}
	for i, s := range svgs {
		dec := xml.NewDecoder(strings.NewReader(s))
		titled := false
		for {
			tok, err := dec.Token()
			if err == io.EOF {
				break
			}
			if err != nil {
				t.Errorf("svg %d is not well-formed XML: %v", i, err)
				break
			}
			if se, ok := tok.(xml.StartElement); ok && se.Name.Local == "title" {
				titled = true
			}
		}
		if !titled || !strings.Contains(s, `role="img"`) {
			t.Errorf("svg %d has no title or role", i)
		}
	}
}

// TestHTMLSize keeps report pages small enough to attach to a CI run or a
// ticket: no embedded font (the page names system fonts), under 150 KB
// for every sample report.
func TestHTMLSize(t *testing.T) {
	for name, r := range map[string]*checks.Report{
		"scorer": reporttest.Scorer(), "failing": reporttest.Failing(),
		"first release": reporttest.FirstRelease(), "encoder": reporttest.Encoder(3),
	} {
		html := renderHTML(t, r)
		t.Logf("%s: %d bytes", name, len(html))
		if len(html) >= 150_000 {
			t.Errorf("%s page is %d bytes, want under 150,000", name, len(html))
		}
		for _, bad := range []string{"@font-face", "data:font", "base64,"} {
			if strings.Contains(html, bad) {
				t.Errorf("%s page embeds a font (%q)", name, bad)
			}
		}
	}
}

func TestHTMLScorer(t *testing.T) {
	html := renderHTML(t, reporttest.Scorer())
	checkPage(t, html, 5)
	for _, want := range []string{
		"promo-scorer@sha256:111111111111… may replace promo-scorer@sha256:222222222222… on promo-scorer:prod",
		reporttest.CandidateDigest, reporttest.BaselineDigest, reporttest.HoldoutDigest, reporttest.PolicyDigest,
		"Calibration (reliability diagram)", "Per-row loss difference", "log loss per slice", "Budget use in percent of the limit",
		"3.4 MiB", "<th scope=\"col\">", "0.1.0-test",
	} {
		if !strings.Contains(html, want) {
			t.Errorf("page lacks %q", want)
		}
	}
	// The verdict comes before everything else.
	if v, id := strings.Index(html, "may replace"), strings.Index(html, "What was gated"); v < 0 || v > id {
		t.Errorf("verdict not first")
	}
	if *keep != "" {
		os.WriteFile(filepath.Join(*keep, "scorer.html"), []byte(html), 0o644)
	}
}

func TestHTMLFail(t *testing.T) {
	html := renderHTML(t, reporttest.Failing())
	checkPage(t, html, 5)
	for _, want := range []string{
		`<header class="verdict fail"`, "FAIL", "2 check(s) failed: contract, holdout",
		"contract: probe rows deviate by 0.031 &gt; tolerance 1e-05",
		"probe row 17", "candidate worse than baseline beyond the margin",
	} {
		if !strings.Contains(html, want) {
			t.Errorf("page lacks %q", want)
		}
	}
	if *keep != "" {
		os.WriteFile(filepath.Join(*keep, "failing.html"), []byte(html), 0o644)
	}
}

func TestHTMLFirstRelease(t *testing.T) {
	html := renderHTML(t, reporttest.FirstRelease())
	// Calibration (candidate only), slices, budget; no decision plot and no
	// loss-difference histogram without a baseline.
	checkPage(t, html, 3)
	svgs := svgRE.FindAllString(html, -1)
	if !strings.Contains(svgs[0], "Calibration") || strings.Contains(svgs[0], ">baseline<") || !strings.Contains(svgs[0], ">candidate<") {
		t.Errorf("first release calibration plot should show the candidate only")
	}
	for _, want := range []string{"may go to promo-scorer:prod (first release)", "none: first release", "No paired test"} {
		if !strings.Contains(html, want) {
			t.Errorf("page lacks %q", want)
		}
	}
}

func TestHTMLEncoder(t *testing.T) {
	html := renderHTML(t, reporttest.Encoder(3))
	// Decision, loss difference, slices, budget and three examples.
	checkPage(t, html, 7)
	for _, want := range []string{"Row 1000: targets and reconstructions", "Row 1074: targets and reconstructions",
		"show:true-crime-weekly", "Reconstruction loss (lower is better)", "reconstruction loss per slice"} {
		if !strings.Contains(html, want) {
			t.Errorf("page lacks %q", want)
		}
	}
	if *keep != "" {
		os.WriteFile(filepath.Join(*keep, "encoder.html"), []byte(html), 0o644)
	}
}

func TestHTMLWithoutDetails(t *testing.T) {
	r := reporttest.Scorer()
	r.Holdout = nil
	for i := range r.Checks {
		r.Checks[i].Contract, r.Checks[i].Holdout, r.Checks[i].Budget = nil, nil, nil
		r.Checks[i].Findings = nil
	}
	html := renderHTML(t, r)
	checkPage(t, html, 0)
	if !strings.Contains(html, "none named by the policy") || !strings.Contains(html, "No findings.") {
		t.Errorf("page does not say what is missing")
	}
}

// TestHTMLOddNumbers feeds values no JSON report carries but a caller
// could: the page still renders, leaving the odd points out.
func TestHTMLOddNumbers(t *testing.T) {
	r := reporttest.Scorer()
	h := r.Checks[3].Holdout
	h.CalibrationCandidate[3].Observed = math.NaN()
	h.LossDiff.Counts[5] = math.Inf(1)
	h.Slices[1].Candidate.LogLoss = math.NaN()
	h.Test.Upper = math.NaN()
	r.Checks[4].Budget.Items[0].Value = math.Inf(1)
	html := renderHTML(t, r)
	checkPage(t, html, 5)
	if strings.Contains(svgRE.FindAllString(html, -1)[0], "NaN") {
		t.Errorf("NaN reached the calibration plot")
	}
}

func TestHTMLEscapesHostileText(t *testing.T) {
	html := renderHTML(t, reporttest.Hostile())
	checkPage(t, html, 5)
	if strings.Contains(html, `<script>alert`) || strings.Contains(html, "\x1b") {
		t.Fatalf("hostile text reached the page unescaped")
	}
	// In tables (html/template) and in plot labels (vgsvg) alike.
	for _, want := range []string{`&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;`, `&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;</text>`} {
		if !strings.Contains(html, want) {
			t.Errorf("page lacks escaped %q", want)
		}
	}
}

// TestDecisionPlotRows checks the decision plot's rows: overall first,
// then each slice with a test, a slice that repeats the overall test once.
func TestDecisionPlotRows(t *testing.T) {
	r := reporttest.Scorer()
	h := r.Checks[3].Holdout
	h.Slices = append(h.Slices, checks.SliceResult{Name: "every row", Rows: h.Test.N, Candidate: h.Candidate,
		Baseline: h.Baseline, Test: h.Test, Status: checks.StatusPass})
	f, ok := forestFigure("d", h)
	if !ok || f.Err != "" {
		t.Fatalf("no decision plot: %q", f.Err)
	}
	svg := string(f.SVG)
	for _, want := range []string{">all rows · PASS<", ">nnz 1–3 · PASS<", ">nnz 41–120 · WARN<", ">margin 0.002<"} {
		if !strings.Contains(svg, want) {
			t.Errorf("decision plot lacks %q", want)
		}
	}
	if strings.Contains(svg, "every row") {
		t.Errorf("the slice repeating the overall test is drawn")
	}
	h.Test = nil
	for i := range h.Slices {
		h.Slices[i].Test = nil
	}
	if _, ok := forestFigure("d", h); ok {
		t.Errorf("decision plot drawn without any test")
	}
}

func TestHTMLFindingsFailuresFirst(t *testing.T) {
	html := renderHTML(t, reporttest.Failing())
	sec := html[strings.Index(html, `id="check-3-heading"`):]
	sec = sec[:strings.Index(sec, "</section>")]
	fail, warn, pass := strings.Index(sec, "probe row 3"), strings.Index(sec, "probe row 4"), strings.Index(sec, "32 probe rows reproduce")
	if fail < 0 || warn < 0 || pass < 0 || fail > warn || warn > pass {
		t.Errorf("findings not ordered FAIL, WARN, PASS: %d %d %d", fail, warn, pass)
	}
}

// TestCalibrationCounts: the calibration plot says how many rows each bin
// holds, one "n=" label per non-empty candidate bin.
func TestCalibrationCounts(t *testing.T) {
	rep := reporttest.Scorer()
	html := renderHTML(t, rep)
	var svg string
	for _, s := range svgRE.FindAllString(html, -1) {
		if strings.Contains(s, "Calibration") {
			svg = s
		}
	}
	if svg == "" {
		t.Fatal("no calibration plot")
	}
	var h *checks.HoldoutDetail
	for _, c := range rep.Checks {
		if c.Holdout != nil {
			h = c.Holdout
		}
	}
	want := 0
	for _, b := range h.CalibrationCandidate {
		if b.Count > 0 {
			want++
			if l := ">n=" + countLabel(b.Count) + "<"; !strings.Contains(svg, l) {
				t.Errorf("no label %q for the bin [%v, %v)", l, b.Lower, b.Upper)
			}
		}
	}
	if got := strings.Count(svg, ">n="); want == 0 || got != want {
		t.Errorf("%d count labels, want %d (one per non-empty bin)", got, want)
	}
	for v, want := range map[float64]string{0: "0", 7.4: "7", 950: "950", 1234: "1.2k", 12345: "12k", 4.5e6: "4.5M"} {
		if got := countLabel(v); got != want {
			t.Errorf("countLabel(%v) = %q, want %q", v, got, want)
		}
	}
}

// TestPlotTextFitted: every text element of every plot carries the width
// it was laid out with (Liberation Sans metrics, gonum's own font) as its
// textLength, so a browser drawing it in a wider fallback font (DejaVu
// Sans on Debian) keeps it in the place the layout gave it.
func TestPlotTextFitted(t *testing.T) {
	var b bytes.Buffer
	if err := HTML(&b, reporttest.Scorer()); err != nil {
		t.Fatal(err)
	}
	page := b.String()
	texts := strings.Count(page, "<text ")
	fitted := regexp.MustCompile(`<text [^>]*textLength="([0-9.]+)" lengthAdjust="spacingAndGlyphs">([^<]+)</text>`).FindAllStringSubmatch(page, -1)
	if texts < 50 || len(fitted) != texts {
		t.Fatalf("%d of %d text elements fitted, want all (and 50 or more)", len(fitted), texts)
	}
	face := font.DefaultCache.Lookup(plotFont, vg.Points(9))
	for _, m := range fitted {
		if m[2] == "perfect calibration" { // a legend entry, 9 pt
			if want := fmt.Sprintf("%.2f", face.Width(m[2]).Points()); m[1] != want {
				t.Errorf("legend %q: textLength %s, want %s", m[2], m[1], want)
			}
			return
		}
	}
	t.Error("no legend entry \"perfect calibration\" found")
}
