package report

import (
	"bytes"
	"fmt"
	"html"
	"html/template"
	"image/color"
	"math"
	"regexp"
	"strconv"
	"strings"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"

	"github.com/modelgate/modelgate/internal/checks"
)

// Plot colours: a blue and an orange that stay apart for the common forms
// of colour blindness, on white; series also differ by line dash and glyph,
// so no plot depends on colour alone.
var (
	colCandidate = color.RGBA{R: 0x1f, G: 0x5a, B: 0xa6, A: 0xff}
	colBaseline  = color.RGBA{R: 0xb8, G: 0x5c, B: 0x00, A: 0xff}
	colTarget    = color.RGBA{R: 0x8a, G: 0x8a, B: 0x8a, A: 0xff}
	colGuide     = color.RGBA{R: 0x55, G: 0x55, B: 0x55, A: 0xff}
	colMargin    = color.RGBA{R: 0xb0, G: 0x1c, B: 0x1c, A: 0xff}
	colBaseFill  = color.RGBA{R: 0xc2, G: 0x6e, B: 0x1a, A: 0xff}
	colHistFill  = color.RGBA{R: 0x9d, G: 0xb9, B: 0xde, A: 0xff}
)

// plotFont is the one face every plot is laid out with; the page draws it
// in a metric-compatible system font (see HTML).
var plotFont = font.Font{Typeface: "Liberation", Variant: "Sans"}

// Plot sizes, in points (1 pt = 4/3 CSS px).
const (
	plotW = vg.Length(480)
	plotH = vg.Length(300)
)

// figure is one rendered plot with its caption.
type figure struct {
	ID      string
	Caption string
	Desc    string        // what the plot shows, in words
	SVG     template.HTML // empty when Err is set
	Err     string        // why the plot could not be drawn
}

// newPlot returns a plot with the page's fonts and a light grid.
func newPlot(title, xLabel, yLabel string) *plot.Plot {
	p := plot.New()
	p.Title.Text = clean(title)
	p.Title.TextStyle.Font = font.From(plotFont, 12)
	p.Title.Padding = vg.Points(6)
	for _, a := range []*plot.Axis{&p.X, &p.Y} {
		a.Label.TextStyle.Font = font.From(plotFont, 10)
		a.Tick.Label.Font = font.From(plotFont, 9)
	}
	p.X.Label.Text = clean(xLabel)
	p.Y.Label.Text = clean(yLabel)
	p.Legend.TextStyle.Font = font.From(plotFont, 9)
	p.Legend.Top = true
	p.Legend.Left = true
	p.Legend.Padding = vg.Points(3)
	g := plotter.NewGrid()
	g.Vertical.Color = color.Gray{Y: 0xe4}
	g.Horizontal.Color = color.Gray{Y: 0xe4}
	p.Add(g)
	return p
}

// render draws p as an inline SVG element labelled by title and desc.
// Text in the SVG is escaped by vgsvg; title and desc are escaped here.
func render(p *plot.Plot, id, title, desc string, w, h vg.Length) (fig figure) {
	fig = figure{ID: id, Caption: clean(title), Desc: clean(desc)}
	defer func() {
		if e := recover(); e != nil {
			fig.SVG, fig.Err = "", fmt.Sprint(e)
		}
	}()
	c := vgsvg.New(w, h)
	// A right margin: the last x tick label is centred on the axis end, and
	// a rotated slice name ends just right of its bar; without it they are
	// cut off at the canvas edge.
	p.Draw(draw.Crop(draw.New(c), 0, -vg.Points(24), 0, 0))
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		fig.Err = err.Error()
		return fig
	}
	s := buf.String()
	i := strings.Index(s, "<svg")
	if i < 0 {
		fig.Err = "no svg element in the plotter's output"
		return fig
	}
	s = fitText(s[i:])
	end := strings.IndexByte(s, '>')
	// Shown at up to 1.8 CSS px per point, narrower on a narrow page.
	head := s[:end] + fmt.Sprintf(` class="plot" style="max-width:%.0fpx" role="img" aria-labelledby="%s-t %s-d"`, 1.8*w.Points(), id, id) + ">"
	head += fmt.Sprintf(`<title id="%s-t">%s</title><desc id="%s-d">%s</desc>`,
		id, html.EscapeString(clean(title)), id, html.EscapeString(clean(desc)))
	fig.SVG = template.HTML(head + s[end+1:])
	return fig
}

// svgText matches a text element as vgsvg writes it: position, style
// with the font size in points, escaped text.
var svgText = regexp.MustCompile(`(<text x="[^"]*" y="[^"]*" transform="scale\(1, -1\)"\s*style="[^"]*font-size:([0-9.eE+-]+)px[^"]*")>([^<]*)</text>`)

// fitText gives every text element the width the plot was laid out with
// (Liberation Sans metrics) as its textLength: a reader without Liberation
// Sans or a metric twin draws the text in another font (Debian's fallback,
// DejaVu Sans, is about a tenth wider), which would otherwise run into the
// legend's swatches, the data and the canvas edge. lengthAdjust squeezes
// or stretches the glyphs to that width (SVG 1.1, section 10.5).
func fitText(svg string) string {
	return svgText.ReplaceAllStringFunc(svg, func(m string) string {
		sm := svgText.FindStringSubmatch(m)
		size, err := strconv.ParseFloat(sm[2], 64)
		text := html.UnescapeString(sm[3])
		if err != nil || size <= 0 || strings.TrimSpace(text) == "" {
			return m
		}
		face := font.DefaultCache.Lookup(plotFont, vg.Points(size))
		w := face.Width(text).Points()
		if w <= 0 || !finite(w) {
			return m
		}
		return fmt.Sprintf(`%s textLength="%.2f" lengthAdjust="spacingAndGlyphs">%s</text>`, sm[1], w, sm[3])
	})
}

func finite(vs ...float64) bool {
	for _, v := range vs {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

// calibrationFigure draws the reliability diagram: mean observed rate
// against mean predicted probability per bin, for the candidate and, when
// present, the baseline, with the diagonal of perfect calibration. Empty
// bins are left out. ok is false when there is nothing to draw.
func calibrationFigure(id string, h *checks.HoldoutDetail) (figure, bool) {
	cand := calibrationPoints(h.CalibrationCandidate)
	base := calibrationPoints(h.CalibrationBaseline)
	if len(cand) == 0 && len(base) == 0 {
		return figure{}, false
	}
	top := 0.0
	for _, xy := range append(append(plotter.XYs{}, cand...), base...) {
		top = math.Max(top, math.Max(xy.X, xy.Y))
	}
	top = niceCeil(top)
	p := newPlot("Calibration", "mean predicted probability", "observed rate")
	p.X.Min, p.Y.Min, p.X.Max, p.Y.Max = 0, 0, top, top
	diag, err := plotter.NewLine(plotter.XYs{{X: 0, Y: 0}, {X: top, Y: top}})
	if err != nil {
		return errFigure(id, "Calibration", err), true
	}
	diag.Color = colGuide
	diag.Dashes = []vg.Length{vg.Points(2), vg.Points(3)}
	p.Add(diag)
	p.Legend.Add("perfect calibration", diag)
	desc := "Reliability diagram: for each bin of predicted probability, the observed rate of positives against the mean prediction; points on the dotted diagonal are perfectly calibrated."
	if len(base) > 0 {
		if err := addLinePoints(p, "baseline", base, colBaseline, []vg.Length{vg.Points(5), vg.Points(3)}, draw.TriangleGlyph{}); err != nil {
			return errFigure(id, "Calibration", err), true
		}
		desc += " Dashed line with triangles: baseline."
	}
	if len(cand) > 0 {
		if err := addLinePoints(p, "candidate", cand, colCandidate, nil, draw.CircleGlyph{}); err != nil {
			return errFigure(id, "Calibration", err), true
		}
		desc += " Solid line with circles: candidate."
	}
	// How many rows each bin holds, beside its point: a bin of a few rows
	// says little. The candidate's bins, else the baseline's.
	bins, whose := h.CalibrationCandidate, "candidate"
	if len(cand) == 0 {
		bins, whose = h.CalibrationBaseline, "baseline"
	}
	right, left := splitBins(bins, 0.75*top)
	if labels := calibrationCounts(right, top); labels != nil {
		labels.Offset = vg.Point{X: vg.Points(6), Y: -vg.Points(9)}
		p.Add(labels)
	}
	if labels := calibrationCounts(left, top); labels != nil {
		labels.Offset = vg.Point{X: -vg.Points(6), Y: vg.Points(9)}
		for i := range labels.TextStyle {
			labels.TextStyle[i].XAlign = draw.XRight
		}
		p.Add(labels)
	}
	if len(right)+len(left) > 0 {
		desc += " Beside each " + whose + " point: the rows (weight) its bin holds."
	}
	return render(p, id, "Calibration (reliability diagram)", desc, plotW*0.8, plotW*0.66), true
}

// splitBins parts the bins whose mean prediction is below x from the
// others (the last ones, near the plot's right edge).
func splitBins(bins []checks.CalibrationBin, x float64) (below, above []checks.CalibrationBin) {
	for _, b := range bins {
		if b.Predicted < x {
			below = append(below, b)
		} else {
			above = append(above, b)
		}
	}
	return below, above
}

// calibrationCounts labels each non-empty bin's point with its row count
// ("n=1.2k").
func calibrationCounts(bins []checks.CalibrationBin, top float64) *plotter.Labels {
	var xyl plotter.XYLabels
	for _, b := range bins {
		if b.Count > 0 && finite(b.Predicted, b.Observed, b.Count) {
			xyl.XYs = append(xyl.XYs, plotter.XY{X: b.Predicted, Y: b.Observed})
			xyl.Labels = append(xyl.Labels, "n="+countLabel(b.Count))
		}
	}
	if len(xyl.XYs) == 0 {
		return nil
	}
	l, err := plotter.NewLabels(xyl)
	if err != nil {
		return nil
	}
	for i := range l.TextStyle {
		l.TextStyle[i].Font = font.From(plotFont, 7)
		l.TextStyle[i].Color = colGuide
		l.TextStyle[i].YAlign = draw.YCenter
	}
	// The curve climbs from bottom left to top right: text below and right
	// of a point, or above and left of it near the right edge, stays off
	// the line. One offset per plotter, so two groups.
	_ = top
	return l
}

// countLabel writes a row count short: 950, 12.3k, 4.5M.
func countLabel(v float64) string {
	switch {
	case v >= 1e6:
		return strconv.FormatFloat(v/1e6, 'f', 1, 64) + "M"
	case v >= 1e4:
		return strconv.FormatFloat(v/1e3, 'f', 0, 64) + "k"
	case v >= 1e3:
		return strconv.FormatFloat(v/1e3, 'f', 1, 64) + "k"
	}
	return strconv.FormatFloat(math.Round(v), 'f', 0, 64)
}

func calibrationPoints(bins []checks.CalibrationBin) plotter.XYs {
	var xys plotter.XYs
	for _, b := range bins {
		if b.Count > 0 && finite(b.Predicted, b.Observed) {
			xys = append(xys, plotter.XY{X: b.Predicted, Y: b.Observed})
		}
	}
	return xys
}

func addLinePoints(p *plot.Plot, name string, xys plotter.XYs, c color.Color, dashes []vg.Length, g draw.GlyphDrawer) error {
	l, s, err := plotter.NewLinePoints(xys)
	if err != nil {
		return err
	}
	l.Color = c
	l.Width = vg.Points(1.5)
	l.Dashes = dashes
	s.Color = c
	s.Shape = g
	s.Radius = vg.Points(3)
	p.Add(l, s)
	p.Legend.Add(name, l, s)
	return nil
}

// lossDiffFigure draws the distribution of per-row loss differences
// (candidate − baseline) with the non-inferiority margin, zero and the
// mean marked. ok is false without a histogram.
func lossDiffFigure(id string, h *checks.HoldoutDetail) (figure, bool) {
	hist := h.LossDiff
	if hist == nil || len(hist.Counts) == 0 || !finite(hist.Min, hist.Max) || hist.Max <= hist.Min {
		return figure{}, false
	}
	width := (hist.Max - hist.Min) / float64(len(hist.Counts))
	top := 0.0
	hp := &plotter.Histogram{Width: width, FillColor: colHistFill, LineStyle: draw.LineStyle{Color: colCandidate, Width: vg.Points(0.5)}}
	for i, c := range hist.Counts {
		if !finite(c) || c < 0 {
			c = 0
		}
		lo := hist.Min + float64(i)*width
		hp.Bins = append(hp.Bins, plotter.HistogramBin{Min: lo, Max: lo + width, Weight: c})
		top = math.Max(top, c)
	}
	if top == 0 {
		top = 1
	}
	what := "loss"
	if h.Kind == "encoder" {
		what = "reconstruction loss"
	}
	p := newPlot("Per-row "+what+" difference", what+" difference per row (candidate − baseline); left of 0: candidate better", "rows")
	p.Legend.Left = false
	p.Add(hp)
	p.Legend.Add("rows per bin", hp)
	legendLines := 1
	p.Y.Min = 0
	desc := "Histogram of the per-row " + what + " difference, candidate minus baseline; rows left of zero are scored better by the candidate."
	vline := func(name string, x float64, c color.Color, dashes []vg.Length, width vg.Length) error {
		l, err := plotter.NewLine(plotter.XYs{{X: x, Y: 0}, {X: x, Y: top * 1.05}})
		if err != nil {
			return err
		}
		l.Color, l.Dashes, l.Width = c, dashes, width
		p.Add(l)
		p.Legend.Add(name, l)
		legendLines++
		return nil
	}
	if err := vline("zero", 0, colGuide, []vg.Length{vg.Points(1), vg.Points(2)}, vg.Points(1)); err != nil {
		return errFigure(id, "Loss difference", err), true
	}
	if t := h.Test; t != nil && finite(t.MeanDiff, t.Margin) {
		if err := vline("mean "+num(t.MeanDiff), t.MeanDiff, colCandidate, nil, vg.Points(1.5)); err != nil {
			return errFigure(id, "Loss difference", err), true
		}
		if err := vline("margin "+num(t.Margin), t.Margin, colMargin, []vg.Length{vg.Points(6), vg.Points(3)}, vg.Points(2)); err != nil {
			return errFigure(id, "Loss difference", err), true
		}
		desc += fmt.Sprintf(" Solid line: the mean difference %s; dashed line: the margin %s the candidate must stay below.", num(t.MeanDiff), num(t.Margin))
	}
	// Headroom above the tallest bar for the legend (top right), so it
	// never sits on the bars: one legend line is about 12 of the plot's
	// ~250 points of height.
	p.Y.Max = top * (1.15 + 0.07*float64(legendLines))
	return render(p, id, "Per-row "+what+" difference", desc, plotW, plotH), true
}

// sliceFigure draws the deciding metric per slice as bars, candidate
// beside baseline. ok is false without slices.
func sliceFigure(id string, h *checks.HoldoutDetail) (figure, bool) {
	if len(h.Slices) == 0 {
		return figure{}, false
	}
	metric, label := sliceMetric(h.Kind)
	var names []string
	var cand, base plotter.Values
	hasBase := false
	for _, s := range h.Slices {
		names = append(names, clean(s.Name))
		cand = append(cand, zeroIfNaN(metric(s.Candidate)))
		if s.Baseline != nil {
			hasBase = true
			base = append(base, zeroIfNaN(metric(*s.Baseline)))
		} else {
			base = append(base, 0)
		}
	}
	p := newPlot(label+" per slice", "slice (by nonzero count or the holdout's slice column)", label+" (lower is better)")
	p.Legend.Left = false
	barW := vg.Points(float64(min(28, 300/(2*len(names)))))
	cb, err := plotter.NewBarChart(cand, barW)
	if err != nil {
		return errFigure(id, "Slices", err), true
	}
	cb.Color = colCandidate
	cb.LineStyle.Width = 0
	desc := "Bars: " + label + " of the candidate for each slice of holdout rows"
	if hasBase {
		bb, err := plotter.NewBarChart(base, barW)
		if err != nil {
			return errFigure(id, "Slices", err), true
		}
		bb.Color = colBaseFill
		bb.LineStyle.Width = 0
		cb.Offset = -barW / 2
		bb.Offset = barW / 2
		p.Add(cb, bb)
		p.Legend.Add("candidate (left, solid blue)", cb)
		p.Legend.Add("baseline (right, orange)", bb)
		desc += ", left bar, beside the baseline's, right bar"
	} else {
		p.Add(cb)
		p.Legend.Add("candidate", cb)
	}
	p.NominalX(names...)
	rotateLong(&p.X, names)
	p.Y.Min = 0
	p.Y.Max *= 1.25 // room for the legend above the bars
	return render(p, id, label+" per slice", desc+".", plotW, plotH), true
}

func sliceMetric(kind string) (func(checks.Metrics) float64, string) {
	if kind == "encoder" {
		return func(m checks.Metrics) float64 { return m.Reconstruct }, "reconstruction loss"
	}
	return func(m checks.Metrics) float64 { return m.LogLoss }, "log loss"
}

// budgetFigure draws each budgeted quantity that has a limit as a
// horizontal bar in percent of its limit, with the baseline's bar beside it
// and a line at 100 %. ok is false when no item has a limit.
func budgetFigure(id string, b *checks.BudgetDetail) (figure, bool) {
	var names, labels []string
	var vals, bases plotter.Values
	hasBase := false
	for _, it := range b.Items {
		if it.Limit == nil || *it.Limit <= 0 || !finite(it.Value, *it.Limit) {
			continue
		}
		names = append(names, clean(it.Name))
		vals = append(vals, math.Max(0, 100*it.Value / *it.Limit)) // a shrinking quantity draws no bar
		labels = append(labels, quantity(it.Value, it.Unit)+" of "+quantity(*it.Limit, it.Unit))
		if it.Baseline != nil && finite(*it.Baseline) {
			hasBase = true
			bases = append(bases, math.Max(0, 100**it.Baseline / *it.Limit))
		} else {
			bases = append(bases, 0)
		}
	}
	if len(names) == 0 {
		return figure{}, false
	}
	// Bottom to top in the plot is the reverse of the table's order.
	reverse(names)
	reverse(labels)
	reverse(vals)
	reverse(bases)
	p := newPlot("Budget use", "percent of the policy's limit", "")
	p.Legend.Left = false
	p.Legend.Top = false
	barW := vg.Points(float64(min(14, 180/(2*len(names)))))
	vb, err := plotter.NewBarChart(vals, barW)
	if err != nil {
		return errFigure(id, "Budget", err), true
	}
	vb.Horizontal = true
	vb.Color = colCandidate
	vb.LineStyle.Width = 0
	desc := "Horizontal bars: each budgeted quantity of the candidate in percent of the policy's limit; the dashed line marks the limit (100 percent)."
	if hasBase {
		bb, err := plotter.NewBarChart(bases, barW)
		if err != nil {
			return errFigure(id, "Budget", err), true
		}
		bb.Horizontal = true
		bb.Color = colBaseFill
		bb.LineStyle.Width = 0
		vb.Offset = barW / 2
		bb.Offset = -barW / 2
		p.Add(bb)
		p.Legend.Add("baseline (lower, orange)", bb)
		desc += " The baseline's bar sits below the candidate's."
	}
	p.Add(vb)
	p.Legend.Add("candidate (upper, solid blue)", vb)
	// The labels stand in a column right of the bars and the limit line.
	right := 100.0
	for _, v := range vals {
		right = math.Max(right, v)
	}
	for _, v := range bases {
		right = math.Max(right, v)
	}
	right *= 1.04
	var xys plotter.XYs
	for i := range vals {
		xys = append(xys, plotter.XY{X: right, Y: float64(i)})
	}
	lb, err := plotter.NewLabels(plotter.XYLabels{XYs: xys, Labels: labels})
	if err != nil {
		return errFigure(id, "Budget", err), true
	}
	for i := range lb.TextStyle {
		lb.TextStyle[i].Font = font.From(plotFont, 8)
		lb.TextStyle[i].YAlign = draw.YCenter
		lb.TextStyle[i].Color = color.Black
	}
	lb.Offset = vg.Point{Y: barW / 2}
	p.Add(lb)
	limit, err := plotter.NewLine(plotter.XYs{{X: 100, Y: -0.5}, {X: 100, Y: float64(len(names)) - 0.5}})
	if err != nil {
		return errFigure(id, "Budget", err), true
	}
	limit.Color = colMargin
	limit.Width = vg.Points(1.5)
	limit.Dashes = []vg.Length{vg.Points(6), vg.Points(3)}
	p.Add(limit)
	p.Legend.Add("limit", limit)
	p.NominalY(names...)
	p.X.Min = 0
	p.Y.Min = -1.8 // an empty band at the bottom for the legend
	h := vg.Points(float64(110 + 36*len(names)))
	return render(p, id, "Budget use in percent of the limit", desc, plotW, h), true
}

// exampleFigure draws one encoder reconstruction example: at each nonzero
// position of the row, the target beside the candidate's (and baseline's)
// reconstruction.
func exampleFigure(id string, ex checks.ReconstructionExample) (figure, bool) {
	n := min(len(ex.Items), len(ex.Targets), len(ex.Candidate), maxExampleItems)
	if n == 0 {
		return figure{}, false
	}
	hasBase := len(ex.Baseline) >= n
	names := make([]string, n)
	for i := range n {
		names[i] = clean(ex.Items[i])
	}
	title := fmt.Sprintf("Row %d: targets and reconstructions", ex.RowID)
	p := newPlot(title, "item (nonzero positions of the row)", "value")
	p.Legend.Left = false
	series := 2
	if hasBase {
		series = 3
	}
	barW := vg.Points(float64(min(18, 320/(series*n))))
	add := func(name string, vs []float64, fill color.Color, line draw.LineStyle, off vg.Length) error {
		vals := make(plotter.Values, n)
		for i := range n {
			vals[i] = zeroIfNaN(vs[i])
		}
		b, err := plotter.NewBarChart(vals, barW)
		if err != nil {
			return err
		}
		b.Color, b.LineStyle, b.Offset = fill, line, off
		p.Add(b)
		p.Legend.Add(name, b)
		return nil
	}
	noLine := draw.LineStyle{}
	var err error
	if hasBase {
		err = add("target (left, grey)", ex.Targets, colTarget, noLine, -barW)
		if err == nil {
			err = add("candidate (middle, blue)", ex.Candidate, colCandidate, noLine, 0)
		}
		if err == nil {
			err = add("baseline (right, orange)", ex.Baseline, colBaseFill, noLine, barW)
		}
	} else {
		err = add("target (left, grey)", ex.Targets, colTarget, noLine, -barW/2)
		if err == nil {
			err = add("candidate (right, blue)", ex.Candidate, colCandidate, noLine, barW/2)
		}
	}
	if err != nil {
		return errFigure(id, title, err), true
	}
	p.NominalX(names...)
	rotateLong(&p.X, names)
	p.Y.Min = 0
	p.Y.Max = math.Max(p.Y.Max, 1) * 1.3 // room for the legend
	desc := fmt.Sprintf("Bars at each of the %d nonzero positions shown of holdout row %d: the target value and the reconstruction.", n, ex.RowID)
	return render(p, id, title, desc, plotW, plotH), true
}

// maxExampleItems caps the positions drawn per reconstruction example.
const maxExampleItems = 24

func rotateLong(a *plot.Axis, names []string) {
	long := 0
	for _, s := range names {
		long = max(long, len([]rune(s)))
	}
	if long*len(names) > 70 {
		a.Tick.Label.Rotation = math.Pi / 6
		a.Tick.Label.XAlign = draw.XRight
		a.Tick.Label.YAlign = draw.YCenter
	}
}

func errFigure(id, title string, err error) figure {
	return figure{ID: id, Caption: clean(title), Err: err.Error()}
}

func zeroIfNaN(v float64) float64 {
	if !finite(v) {
		return 0
	}
	return v
}

func reverse[T any](s []T) {
	for i, j := 0, len(s)-1; i < j; i, j = i+1, j-1 {
		s[i], s[j] = s[j], s[i]
	}
}

// niceCeil rounds v up to 1, 2 or 5 times a power of ten, at most 1 for
// probabilities and at least a small positive number.
func niceCeil(v float64) float64 {
	if v <= 0 || !finite(v) {
		return 1
	}
	if v >= 1 {
		return 1
	}
	e := math.Pow(10, math.Floor(math.Log10(v)))
	for _, m := range []float64{1, 2, 5, 10} {
		if m*e >= v*1.02 {
			return math.Min(1, m*e)
		}
	}
	return 1
}

// forestFigure draws the non-inferiority decision: for all rows and for
// each slice with a test, the mean loss difference (point) and the
// distance to its upper one-sided bound (bar), against zero and the
// margin. A row passes when its bar ends left of the margin. ok is false
// without a test.
func forestFigure(id string, h *checks.HoldoutDetail) (figure, bool) {
	type row struct {
		name, status string
		t            *checks.NonInferiority
	}
	var rows []row
	if t := h.Test; t != nil {
		st := checks.StatusFail
		if t.Pass {
			st = checks.StatusPass
		}
		rows = append(rows, row{"all rows", st, t})
	}
	for _, s := range h.Slices {
		// A slice holding every row repeats the overall test: draw it once.
		if s.Test != nil && (h.Test == nil || *s.Test != *h.Test) {
			rows = append(rows, row{clean(s.Name), clean(s.Status), s.Test})
		}
	}
	var kept []row
	for _, r := range rows {
		if finite(r.t.MeanDiff, r.t.Upper, r.t.Margin) {
			kept = append(kept, r)
		}
	}
	if len(kept) == 0 {
		return figure{}, false
	}
	reverse(kept) // all rows at the top
	margin := kept[len(kept)-1].t.Margin
	var names []string
	pts := make(plotterXYErrs, len(kept))
	for i, r := range kept {
		names = append(names, r.name+" · "+r.status)
		pts[i] = xyErr{x: r.t.MeanDiff, y: float64(i), high: math.Max(0, r.t.Upper-r.t.MeanDiff)}
	}
	what := "loss"
	if h.Kind == "encoder" {
		what = "reconstruction loss"
	}
	title := "Non-inferiority: mean " + what + " difference and its bound"
	p := newPlot(title, "mean difference per row (candidate − baseline)", "")
	p.Legend.Left = false
	p.Legend.Top = false
	bars, err := plotter.NewXErrorBars(pts)
	if err != nil {
		return errFigure(id, title, err), true
	}
	bars.Color = colCandidate
	bars.Width = vg.Points(2)
	bars.CapWidth = vg.Points(10)
	sc, err := plotter.NewScatter(pts)
	if err != nil {
		return errFigure(id, title, err), true
	}
	sc.Color = colCandidate
	sc.Shape = draw.CircleGlyph{}
	sc.Radius = vg.Points(4)
	p.Add(bars, sc)
	p.Legend.Add("mean (point) and upper bound (bar end)", sc)
	top := float64(len(kept)) - 0.5
	vline := func(name string, x float64, c color.Color, dashes []vg.Length, width vg.Length) error {
		l, err := plotter.NewLine(plotter.XYs{{X: x, Y: -0.5}, {X: x, Y: top}})
		if err != nil {
			return err
		}
		l.Color, l.Dashes, l.Width = c, dashes, width
		p.Add(l)
		p.Legend.Add(name, l)
		return nil
	}
	if err := vline("zero: no difference", 0, colGuide, []vg.Length{vg.Points(1), vg.Points(2)}, vg.Points(1)); err != nil {
		return errFigure(id, title, err), true
	}
	if err := vline("margin "+num(margin), margin, colMargin, []vg.Length{vg.Points(6), vg.Points(3)}, vg.Points(2)); err != nil {
		return errFigure(id, title, err), true
	}
	p.NominalY(names...)
	p.Y.Min = -1.8 // an empty band at the bottom for the legend
	desc := fmt.Sprintf("For all rows and each slice: the mean per-row %s difference (point) and its upper one-sided bound (end of the bar). A row passes when its bar ends left of the dashed margin at %s; left of the dotted zero line the candidate is better than the baseline.", what, num(margin))
	return render(p, id, title, desc, plotW, vg.Points(float64(120+30*len(kept)))), true
}

// xyErr is a point with an error to the right only.
type xyErr struct{ x, y, high float64 }

type plotterXYErrs []xyErr

func (e plotterXYErrs) Len() int                        { return len(e) }
func (e plotterXYErrs) XY(i int) (float64, float64)     { return e[i].x, e[i].y }
func (e plotterXYErrs) XError(i int) (float64, float64) { return 0, e[i].high }
