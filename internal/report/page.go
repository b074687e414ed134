package report

// pageHTML is the page's template: plain HTML and CSS, no script, no
// request. Status reads from its word and symbol; colour only adds to them.
const pageHTML = `{{define "badge"}}<span class="badge {{statusClass .}}"><span aria-hidden="true">{{statusMark .}}</span> {{.}}</span>{{end -}}
<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="modelgate">
<title>{{.Title}}</title>
<style>
:root{color-scheme:light}
*{box-sizing:border-box}
body{margin:0;background:#fff;color:#1a1a1a;font:16px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"Liberation Sans",Arial,sans-serif}
main{max-width:1040px;margin:0 auto;padding:24px 24px 48px}
h1{font-size:1.75rem;line-height:1.25;margin:.25rem 0 .5rem}
h2{font-size:1.35rem;margin:2.5rem 0 .5rem;padding-bottom:.25rem;border-bottom:2px solid #d0d0d0}
h3{font-size:1.1rem;margin:1.5rem 0 .5rem}
p{margin:.5rem 0}
code,.mono{font-family:ui-monospace,"Liberation Mono",Menlo,Consolas,monospace;font-size:.9em}
.digest{word-break:break-all}
.muted{color:#555}
.verdict{border:2px solid;border-left-width:12px;border-radius:6px;padding:16px 20px;margin:8px 0 24px}
.verdict.pass{background:#e9f5ec;border-color:#1e7b34;color:#0d3319}
.verdict.fail{background:#fdecea;border-color:#b3261e;color:#4d0c08}
.verdict .word{display:block;font-size:2.5rem;font-weight:800;letter-spacing:.04em}
.verdict .what{display:block;font-size:1.3rem;font-weight:600;overflow-wrap:anywhere}
.verdict .eyebrow{margin:0;font-size:.9rem;text-transform:uppercase;letter-spacing:.08em}
.verdict ul{margin:.5rem 0 0;padding-left:1.25rem}
.verdict li{margin:.2rem 0}
.wrap,.summary{overflow-wrap:anywhere}
.badge{display:inline-block;min-width:4.2em;padding:0 .45em;border:1px solid;border-radius:4px;font-weight:700;font-size:.85rem;line-height:1.6;text-align:center;white-space:nowrap;font-family:ui-monospace,"Liberation Mono",Menlo,Consolas,monospace}
h2 .badge{font-size:.9rem;vertical-align:middle;margin-left:.5rem}
.s-pass{background:#e9f5ec;color:#14532d;border-color:#1e7b34}
.s-fail{background:#fdecea;color:#7f1d1d;border-color:#b3261e}
.s-warn{background:#fff5d6;color:#5c3d00;border-color:#a87400}
.s-skip,.s-other{background:#f0f0f0;color:#333;border-color:#888}
table{border-collapse:collapse;margin:.5rem 0 1rem;width:100%;font-size:.92rem}
caption{text-align:left;font-weight:700;padding:.25rem 0}
th,td{border:1px solid #c8c8c8;padding:.3rem .5rem;text-align:left;vertical-align:top}
td.wrap{overflow-wrap:anywhere}
thead th{background:#f2f4f7}
tbody th{background:#fafafa;font-weight:600;white-space:nowrap}
tbody th.wrap{white-space:normal}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
tr.row-fail td,tr.row-fail th{background:#fff3f2}
tr.row-warn td,tr.row-warn th{background:#fffaeb}
.summary{font-size:1.05rem}
figure{margin:1rem 0 1.5rem;padding:12px;border:1px solid #d8d8d8;border-radius:6px;background:#fff}
figcaption{margin-top:.5rem;color:#444;font-size:.9rem}
svg.plot{display:block;width:100%;height:auto}
svg.plot text{font-family:"Liberation Sans",Arimo,Arial,Helvetica,sans-serif!important}
.plot-error{padding:1rem;border:1px dashed #b3261e;color:#7f1d1d}
details{margin:.25rem 0 1rem}
summary{cursor:pointer;color:#1f4f8f}
nav ol{padding-left:1.25rem}
footer{margin-top:3rem;padding-top:1rem;border-top:1px solid #d0d0d0;color:#444;font-size:.9rem}
a{color:#1f4f8f}
@media print{.verdict{break-inside:avoid}figure{break-inside:avoid}}
</style>
</head>
<body>
<main>
<header class="verdict {{if .Pass}}pass{{else}}fail{{end}}" aria-labelledby="verdict-heading">
<p class="eyebrow">modelgate gate report</p>
<h1 id="verdict-heading"><span class="word">{{if .Pass}}<span aria-hidden="true">✓</span> PASS{{else}}<span aria-hidden="true">✗</span> FAIL{{end}}</span> <span class="what">{{.Headline}}</span></h1>
{{if .Reasons}}<p><strong>Why it failed:</strong></p>
<ul>{{range .Reasons}}<li class="wrap">{{.}}</li>{{end}}</ul>{{end}}
<p>{{.Counts}}.</p>
</header>

<nav aria-labelledby="checks-heading">
<h2 id="checks-heading">Checks</h2>
<table>
<thead><tr><th scope="col">Status</th><th scope="col">Check</th><th scope="col">Deciding number and threshold</th><th scope="col">Time</th></tr></thead>
<tbody>
{{range .Checks}}<tr class="{{rowClass .Status}}"><td>{{template "badge" .Status}}</td><th scope="row"><a href="#{{.ID}}">{{.Name}}</a></th><td class="wrap">{{.Summary}}</td><td class="num">{{.Seconds}}</td></tr>
{{end}}</tbody>
</table>
</nav>

<section aria-labelledby="identity-heading">
<h2 id="identity-heading">What was gated</h2>
<table>
<thead><tr><th scope="col">Role</th><th scope="col">Reference</th><th scope="col">Digest</th><th scope="col">Notes</th></tr></thead>
<tbody>
{{range .Identity}}<tr><th scope="row">{{.Label}}</th><td class="wrap">{{.Ref}}</td><td class="mono digest">{{.Digest}}</td><td>{{.Note}}</td></tr>
{{end}}</tbody>
</table>
</section>

{{range .Checks}}
<section id="{{.ID}}" aria-labelledby="{{.ID}}-heading">
<h2 id="{{.ID}}-heading">Check: {{.Name}} {{template "badge" .Status}}</h2>
<p class="summary">{{.Summary}}</p>
<p class="muted">Took {{.Seconds}}.</p>

{{if .Findings}}
<table>
<caption>Findings</caption>
<thead><tr><th scope="col">Status</th><th scope="col">Code</th><th scope="col">Where</th><th scope="col">Message</th><th scope="col">Value</th><th scope="col">Limit</th></tr></thead>
<tbody>
{{range .Findings}}<tr class="{{rowClass .Status}}"><td>{{template "badge" .Status}}</td><td><code>{{.Code}}</code></td><td class="wrap">{{.Where}}</td><td class="wrap">{{.Message}}</td><td class="num">{{.Value}}</td><td class="num">{{.Limit}}</td></tr>
{{end}}</tbody>
</table>
{{else}}
<p class="muted">No findings.</p>
{{end}}

{{with .Contract}}
<table>
<caption>Input-contract tests</caption>
<thead><tr><th scope="col">Test</th><th scope="col">Status</th><th scope="col">Rows</th><th scope="col">Maximum deviation</th><th scope="col">Tolerance</th><th scope="col">Note</th></tr></thead>
<tbody>
{{range .}}<tr><th scope="row" class="wrap">{{.Name}}</th><td>{{template "badge" .Status}}</td><td class="num">{{.Rows}}</td><td class="num">{{.MaxDeviation}}</td><td class="num">{{.Tolerance}}</td><td class="wrap">{{.Note}}</td></tr>
{{end}}</tbody>
</table>
{{end}}

{{with .Holdout}}
<table>
<caption>Holdout metrics ({{.Kind}})</caption>
<thead><tr><th scope="col">Metric</th><th scope="col">Candidate</th>{{if .HasBaseline}}<th scope="col">Baseline</th><th scope="col">Candidate − baseline</th>{{end}}</tr></thead>
<tbody>
{{range .Metrics}}<tr><th scope="row" class="wrap">{{.Name}}</th><td class="num">{{.Candidate}}</td>{{if .Baseline}}<td class="num">{{.Baseline}}</td><td class="num">{{.Diff}}</td>{{end}}</tr>
{{end}}</tbody>
</table>
{{if .WeightsText}}<p>{{.WeightsText}}</p>{{end}}
{{if .Test}}
<h3>Non-inferiority test {{template "badge" .TestPass}}</h3>
<p>{{.TestText}}</p>
<table>
<thead><tr><th scope="col">Quantity</th><th scope="col">Value</th></tr></thead>
<tbody>
{{range .Test}}<tr><th scope="row" class="wrap">{{.Name}}</th><td class="num">{{.Candidate}}</td></tr>
{{end}}</tbody>
</table>
{{else}}
<p class="muted">No paired test: there is no baseline to compare with; the candidate is held to the policy's absolute thresholds.</p>
{{end}}
{{if .Slices}}{{$hb := .HasBaseline}}
<table>
<caption>Slices: rows bucketed by nonzero count, and by the holdout's slice column ({{.SliceMetric}}). A slice warns only on evidence of harm: the lower bound of its mean difference above its margin after Holm's correction across the slices tested; a slice with too few rows is shown, not judged.</caption>
<thead><tr><th scope="col">Slice</th><th scope="col">Status</th><th scope="col">Rows</th><th scope="col">Candidate</th>{{if $hb}}<th scope="col">Baseline</th><th scope="col">Mean difference</th><th scope="col">Upper bound</th><th scope="col">Lower bound (harm test)</th><th scope="col">Holm-adjusted p of harm</th><th scope="col">Note</th>{{end}}</tr></thead>
<tbody>
{{range .Slices}}<tr><th scope="row" class="wrap">{{.Name}}</th><td>{{template "badge" .Status}}</td><td class="num">{{.Rows}}</td><td class="num">{{.Candidate}}</td>{{if $hb}}<td class="num">{{.Baseline}}</td><td class="num">{{.MeanDiff}}</td><td class="num">{{.Upper}}</td><td class="num">{{.Lower}}</td><td class="num">{{.PAdjusted}}</td><td class="wrap">{{.Note}}</td>{{end}}</tr>
{{end}}</tbody>
</table>
{{end}}
{{end}}

{{with .Budget}}
<table>
<caption>Budget</caption>
<thead><tr><th scope="col">Quantity</th><th scope="col">Status</th><th scope="col">Candidate</th><th scope="col">Limit</th><th scope="col">Share of limit</th><th scope="col">Baseline</th></tr></thead>
<tbody>
{{range .}}<tr><th scope="row" class="wrap">{{.Name}}</th><td>{{template "badge" .Status}}</td><td class="num">{{.Value}}</td><td class="num">{{.Limit}}</td><td class="num">{{.Share}}</td><td class="num">{{.Baseline}}</td></tr>
{{end}}</tbody>
</table>
{{end}}

{{range .Figures}}
<figure id="{{.ID}}">
{{if .Err}}<p class="plot-error">The plot “{{.Caption}}” could not be drawn: {{.Err}}</p>{{else}}{{.SVG}}{{end}}
<figcaption>{{.Desc}}</figcaption>
</figure>
{{end}}

{{with .Holdout}}{{if or .CalCand .CalBase}}
<details>
<summary>Calibration bins (the data of the calibration plot)</summary>
{{if .CalCand}}<table>
<caption>Candidate</caption>
<thead><tr><th scope="col">Predicted range</th><th scope="col">Weight</th><th scope="col">Mean predicted</th><th scope="col">Observed rate</th></tr></thead>
<tbody>{{range .CalCand}}<tr><th scope="row">{{.Range}}</th><td class="num">{{.Count}}</td><td class="num">{{.Predicted}}</td><td class="num">{{.Observed}}</td></tr>{{end}}</tbody>
</table>{{end}}
{{if .CalBase}}<table>
<caption>Baseline</caption>
<thead><tr><th scope="col">Predicted range</th><th scope="col">Weight</th><th scope="col">Mean predicted</th><th scope="col">Observed rate</th></tr></thead>
<tbody>{{range .CalBase}}<tr><th scope="row">{{.Range}}</th><td class="num">{{.Count}}</td><td class="num">{{.Predicted}}</td><td class="num">{{.Observed}}</td></tr>{{end}}</tbody>
</table>{{end}}
</details>
{{end}}{{end}}

</section>
{{end}}

<footer>
<p>Written by {{.Generated}}. Digests are SHA-256 of the stored artifacts and of the policy file: the verdict holds for exactly these.</p>
<p>The gate's verdict supports, and does not replace, the team's own review, its privacy and data-protection duties, and local law and policy.</p>
</footer>
</main>
</body>
</html>
`
