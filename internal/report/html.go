package report

import (
	"bytes"
	"fmt"
	"html/template"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"

	"github.com/modelgate/modelgate/internal/checks"
)

// HTML writes r as one self-contained page for a release manager: the
// verdict first, then what was gated, then a section per check with its
// findings and, where the report carries the data, plots drawn as inline
// SVG. The page makes no request, needs no script and embeds no font: the
// plots are laid out with Liberation Sans metrics and drawn in the first
// of Liberation Sans, Arimo, Arial or Helvetica the reader's system has
// (the four share those metrics), else its sans-serif, each text squeezed
// to its laid-out width (fitText). Every string from the
// report is HTML-escaped. A plot that cannot be drawn is replaced by a
// note; the error is returned only when writing fails.
func HTML(w io.Writer, r *checks.Report) error {
	if r == nil {
		return fmt.Errorf("rendering report: no report")
	}
	page, err := buildPage(r)
	if err != nil {
		return err
	}
	var buf bytes.Buffer
	if err := pageTemplate.Execute(&buf, page); err != nil {
		return fmt.Errorf("rendering report page: %w", err)
	}
	if _, err := buf.WriteTo(w); err != nil {
		return fmt.Errorf("writing report page: %w", err)
	}
	return nil
}

type page struct {
	Title     string
	Pass      bool
	Headline  string
	Reasons   []string
	Counts    string
	Identity  []identityRow
	Checks    []checkView
	Generated string
}

type identityRow struct {
	Label  string
	Ref    string
	Digest string
	Note   string
}

type checkView struct {
	ID       string
	Name     string
	Status   string
	Summary  string
	Seconds  string
	Findings []findingView
	Contract []contractView
	Holdout  *holdoutView
	Budget   []budgetView
	Figures  []figure
}

type findingView struct {
	Status, Code, Where, Message, Value, Limit string
}

type contractView struct {
	Name, Status, Rows, MaxDeviation, Tolerance, Note string
}

type budgetView struct {
	Name, Status, Value, Limit, Baseline, Share string
}

type holdoutView struct {
	Kind        string
	HasBaseline bool
	Metrics     []metricRow
	Test        []metricRow
	TestText    string
	WeightsText string // where the rows' weights and slices came from
	TestPass    string // PASS / FAIL, empty without a test
	Slices      []sliceView
	SliceMetric string
	CalCand     []calRow
	CalBase     []calRow
}

type metricRow struct {
	Name, Candidate, Baseline, Diff string
}

type sliceView struct {
	Name, Status, Rows, Candidate, Baseline, MeanDiff, Upper string
	Lower, PAdjusted, Note                                   string
}

type calRow struct {
	Range, Count, Predicted, Observed string
}

func buildPage(r *checks.Report) (*page, error) {
	pg := &page{
		Pass:      r.Verdict == checks.VerdictPass,
		Title:     "Gate report: " + clean(r.Target),
		Generated: clean(r.Tool.Name) + " " + clean(r.Tool.Version) + ", " + clean(r.Created),
	}
	_, rest, _ := strings.Cut(VerdictLine(r), " — ")
	pg.Headline = rest
	if !pg.Pass {
		for _, s := range r.Reasons {
			pg.Reasons = append(pg.Reasons, clean(s))
		}
	}
	counts := map[string]int{}
	for _, c := range r.Checks {
		counts[c.Status]++
	}
	pg.Counts = fmt.Sprintf("%d checks: %d passed, %d failed, %d with warnings, %d skipped",
		len(r.Checks), counts[checks.StatusPass], counts[checks.StatusFail], counts[checks.StatusWarn], counts[checks.StatusSkip])

	pg.Identity = []identityRow{
		{Label: "Target tag", Ref: clean(r.Target)},
		subjectRow("Candidate", &r.Candidate, ""),
		subjectRow("Baseline", r.Baseline, "none: first release"),
		subjectRow("Holdout", r.Holdout, "none named by the policy"),
		{Label: "Policy", Ref: clean(policyLabel(r.Policy)), Digest: clean(r.Policy.Digest)},
		{Label: "Tool", Ref: clean(r.Tool.Name) + " " + clean(r.Tool.Version)},
		{Label: "Created", Ref: clean(r.Created)},
	}
	for i, c := range r.Checks {
		pg.Checks = append(pg.Checks, checkSection(i, c))
	}
	return pg, nil
}

func subjectRow(label string, s *checks.Subject, none string) identityRow {
	if s == nil {
		return identityRow{Label: label, Note: none}
	}
	row := identityRow{Label: label, Ref: clean(s.Ref), Digest: clean(s.Digest)}
	var notes []string
	if s.Kind != "" {
		notes = append(notes, clean(s.Kind))
	}
	if s.Name != "" {
		notes = append(notes, "spec name "+clean(s.Name))
	}
	if s.Rows > 0 {
		notes = append(notes, num(float64(s.Rows))+" rows")
	}
	row.Note = strings.Join(notes, ", ")
	return row
}

func checkSection(i int, c checks.CheckResult) checkView {
	v := checkView{
		ID:      fmt.Sprintf("check-%d", i+1),
		Name:    clean(c.Name),
		Status:  clean(c.Status),
		Summary: clean(c.Summary),
		Seconds: strconv.FormatFloat(c.Seconds, 'f', 2, 64) + " s",
	}
	// Failures first, then warnings, then the rest, each in report order.
	findings := slices.Clone(c.Findings)
	slices.SortStableFunc(findings, func(a, b checks.Finding) int { return severity(a.Status) - severity(b.Status) })
	for _, f := range findings {
		fv := findingView{Status: clean(f.Status), Code: clean(f.Code), Where: clean(f.Where), Message: clean(f.Message)}
		if f.Value != nil {
			fv.Value = num(*f.Value)
		}
		if f.Limit != nil {
			fv.Limit = num(*f.Limit)
		}
		v.Findings = append(v.Findings, fv)
	}
	if c.Contract != nil {
		for _, it := range c.Contract.Items {
			v.Contract = append(v.Contract, contractView{
				Name: clean(it.Name), Status: clean(it.Status), Rows: num(float64(it.Rows)),
				MaxDeviation: num(it.MaxDeviation), Tolerance: num(it.Tolerance), Note: clean(it.Note),
			})
		}
	}
	fig := func(kind string) string { return fmt.Sprintf("%s-%s-%d", v.ID, kind, len(v.Figures)+1) }
	if h := c.Holdout; h != nil {
		v.Holdout = holdoutSection(h)
		if f, ok := calibrationFigure(fig("calibration"), h); ok {
			v.Figures = append(v.Figures, f)
		}
		if f, ok := forestFigure(fig("decision"), h); ok {
			v.Figures = append(v.Figures, f)
		}
		if f, ok := lossDiffFigure(fig("lossdiff"), h); ok {
			v.Figures = append(v.Figures, f)
		}
		if f, ok := sliceFigure(fig("slices"), h); ok {
			v.Figures = append(v.Figures, f)
		}
		for _, ex := range h.Examples {
			if f, ok := exampleFigure(fig("example"), ex); ok {
				v.Figures = append(v.Figures, f)
			}
		}
	}
	if b := c.Budget; b != nil {
		for _, it := range b.Items {
			bv := budgetView{Name: clean(it.Name), Status: clean(it.Status), Value: quantity(it.Value, it.Unit)}
			if it.Limit != nil {
				bv.Limit = quantity(*it.Limit, it.Unit)
				if *it.Limit > 0 {
					bv.Share = strconv.FormatFloat(100*it.Value / *it.Limit, 'f', 0, 64) + " %"
				}
			}
			if it.Baseline != nil {
				bv.Baseline = quantity(*it.Baseline, it.Unit)
			}
			v.Budget = append(v.Budget, bv)
		}
		if f, ok := budgetFigure(fig("budget"), b); ok {
			v.Figures = append(v.Figures, f)
		}
	}
	return v
}

func holdoutSection(h *checks.HoldoutDetail) *holdoutView {
	hv := &holdoutView{Kind: clean(h.Kind), HasBaseline: h.Baseline != nil}
	type metric struct {
		name string
		get  func(checks.Metrics) float64
	}
	weighted := h.Weights != nil && h.Weights.Weighted()
	ms := []metric{
		{"Log loss, plain, as scikit-learn computes it (lower is better)", func(m checks.Metrics) float64 { return m.LogLoss }},
	}
	if weighted {
		ms = append(ms, metric{"Log loss, weighted (the test's weights, see below)", func(m checks.Metrics) float64 { return m.WeightedLogLoss }})
	}
	ms = append(ms, []metric{
		{"Normalized entropy (lower is better)", func(m checks.Metrics) float64 { return m.NormalizedEntropy }},
		{"ROC AUC (higher is better)", func(m checks.Metrics) float64 { return m.AUC }},
		{"Expected calibration error (lower is better)", func(m checks.Metrics) float64 { return m.ECE }},
		{"Maximum calibration error (lower is better)", func(m checks.Metrics) float64 { return m.MCE }},
		{"Predicted / observed (1 is ideal)", func(m checks.Metrics) float64 { return m.PredictedObserved }},
	}...)
	if w := h.Weights; w != nil {
		hv.WeightsText = "Rows are sliced and weighted by thresholds from " + w.Describe() + ", never from the candidate's own files."
		if a := w.AnomalyAbove; a != nil && h.Kind != "encoder" {
			hv.WeightsText += fmt.Sprintf(" Rows with more than %s nonzeros are anomalous and weigh %s in the weighted figures and the test.", num(*a), num(w.AnomalyWeight))
		}
		if w.HoldoutWeights {
			hv.WeightsText += " The holdout's weight column is multiplied in."
		}
		if h.Kind != "encoder" && weighted {
			hv.WeightsText += " The other scorer metrics and the test are weighted."
		}
	}
	if h.Kind == "encoder" {
		ms = []metric{
			{"Reconstruction loss (lower is better)", func(m checks.Metrics) float64 { return m.Reconstruct }},
			{"BCE over all outputs", func(m checks.Metrics) float64 { return m.BCEAll }},
			{"BCE over nonzero targets", func(m checks.Metrics) float64 { return m.BCENonzero }},
		}
	}
	ms = append(ms,
		metric{"Rows", func(m checks.Metrics) float64 { return float64(m.Rows) }},
		metric{"Weight sum", func(m checks.Metrics) float64 { return m.WeightSum }})
	for _, m := range ms {
		row := metricRow{Name: m.name, Candidate: num(m.get(h.Candidate))}
		if h.Baseline != nil {
			b := m.get(*h.Baseline)
			row.Baseline = num(b)
			row.Diff = signed(m.get(h.Candidate) - b)
		}
		hv.Metrics = append(hv.Metrics, row)
	}
	if t := h.Test; t != nil {
		conf := strconv.FormatFloat(100*t.Confidence, 'g', 4, 64) + "%"
		hv.TestPass = checks.StatusFail
		rel := "≥"
		if t.Pass {
			hv.TestPass, rel = checks.StatusPass, "<"
		}
		hv.TestText = fmt.Sprintf("The candidate may not lose more than the margin: it passes when the upper one-sided %s bound of the mean per-row difference (candidate − baseline) is below the margin. Here %s %s %s.",
			conf, signed(t.Upper), rel, num(t.Margin))
		hv.Test = []metricRow{
			{Name: "Margin", Candidate: num(t.Margin)},
			{Name: "Confidence", Candidate: conf},
			{Name: "Rows (n)", Candidate: num(float64(t.N))},
			{Name: "Mean difference", Candidate: signed(t.MeanDiff)},
			{Name: "Standard error", Candidate: num(t.StdErr)},
			{Name: "Upper bound (paired t)", Candidate: signed(t.Upper)},
			{Name: "t, degrees of freedom", Candidate: signed(t.T) + ", " + num(t.DF)},
			{Name: "One-sided p-value", Candidate: num(t.P)},
			{Name: "Bootstrap interval", Candidate: fmt.Sprintf("[%s, %s] from %d Poisson replicates", signed(t.BootstrapLower), signed(t.BootstrapUpper), t.BootstrapReplicas)},
		}
	}
	sliceOf, label := sliceMetric(h.Kind)
	hv.SliceMetric = label
	for _, s := range h.Slices {
		sv := sliceView{Name: clean(s.Name), Status: clean(s.Status), Rows: num(float64(s.Rows)), Candidate: num(sliceOf(s.Candidate))}
		if s.Baseline != nil {
			sv.Baseline = num(sliceOf(*s.Baseline))
		}
		if s.Test != nil {
			sv.MeanDiff, sv.Upper = signed(s.Test.MeanDiff), signed(s.Test.Upper)
		}
		if s.Harm != nil {
			sv.Lower, sv.PAdjusted = signed(s.Harm.Lower), num(s.Harm.PAdjusted)
		}
		sv.Note = clean(s.Note)
		hv.Slices = append(hv.Slices, sv)
	}
	cal := func(bins []checks.CalibrationBin) []calRow {
		var out []calRow
		for _, b := range bins {
			out = append(out, calRow{Range: "[" + num(b.Lower) + ", " + num(b.Upper) + ")", Count: num(b.Count), Predicted: num(b.Predicted), Observed: num(b.Observed)})
		}
		return out
	}
	hv.CalCand, hv.CalBase = cal(h.CalibrationCandidate), cal(h.CalibrationBaseline)
	return hv
}

// signed formats a difference with an explicit sign (a true minus).
func signed(v float64) string {
	s := num(v)
	switch {
	case v > 0:
		return "+" + s
	case v < 0:
		return "−" + s[1:]
	}
	return s
}

// quantity formats a budgeted value with its unit for people.
func quantity(v float64, unit string) string {
	switch unit {
	case "bytes", "byte", "B":
		return iec(v)
	case "count", "":
		return num(v)
	case "params", "parameters":
		return si(v) + " params"
	case "fraction":
		// Growth and other shares: a signed percentage.
		return signed(100*v) + " %"
	case "ratio":
		return "×" + num(v)
	}
	return num(v) + " " + clean(unit)
}

func iec(v float64) string {
	units := []string{"B", "KiB", "MiB", "GiB", "TiB"}
	i := 0
	for math.Abs(v) >= 1024 && i < len(units)-1 {
		v /= 1024
		i++
	}
	if i == 0 {
		return strconv.FormatFloat(v, 'f', 0, 64) + " B"
	}
	return strconv.FormatFloat(v, 'f', 1, 64) + " " + units[i]
}

func si(v float64) string {
	switch a := math.Abs(v); {
	case a >= 1e9:
		return num(v/1e9) + " G"
	case a >= 1e6:
		return num(v/1e6) + " M"
	case a >= 1e3:
		return num(v/1e3) + " k"
	}
	return num(v)
}

// statusClass gives each status a class (checks.StatusMark its symbol, so
// a status reads without colour).
func statusClass(s string) string {
	switch s {
	case checks.StatusPass, checks.StatusFail, checks.StatusWarn, checks.StatusSkip:
		return "s-" + strings.ToLower(s)
	}
	return "s-other"
}

// severity orders statuses for reading: FAIL, WARN, then the rest.
func severity(s string) int {
	switch s {
	case checks.StatusFail:
		return 0
	case checks.StatusWarn:
		return 1
	}
	return 2
}

// rowClass tints table rows of failing and warning entries.
func rowClass(s string) string {
	switch s {
	case checks.StatusFail:
		return "row-fail"
	case checks.StatusWarn:
		return "row-warn"
	}
	return "row"
}

var pageTemplate = template.Must(template.New("page").Funcs(template.FuncMap{
	"statusClass": statusClass,
	"statusMark":  checks.StatusMark,
	"rowClass":    rowClass,
}).Parse(pageHTML))
