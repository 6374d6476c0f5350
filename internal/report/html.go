package report

import (
	"fmt"
	"html/template"
	"math"
	"os"
	"sort"
	"strings"
)

type paramFigs struct{ Name, Trace, Marginal string }

// page is what index.html shows.
type page struct {
	Run          *Run
	Stats        []Stat
	Level        float64
	Progress     string
	Overview     string
	OverviewAims string
	DetailNote   string
	Params       []paramFigs
	Pairs        string
	PairNames    []string
}

type fact struct{ Key, Value string }

// Facts lists the summary's plain values (text, numbers, yes/no), and
// the history's end, sorted by key.
func (p *page) Facts() []fact {
	var out []fact
	for k, v := range p.Run.Summary {
		var s string
		switch v := v.(type) {
		case string:
			s = v
		case float64:
			s = fmtNum(v)
		case bool:
			s = map[bool]string{true: "yes", false: "no"}[v]
		default:
			continue
		}
		out = append(out, fact{strings.ReplaceAll(k, "_", " "), s})
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Key < out[j].Key })
	if h := p.Run.History; len(h) > 0 {
		last := h[len(h)-1]
		out = append(out, fact{"history records", fmt.Sprint(len(h))})
		if last.Reason != "" {
			out = append(out, fact{"ended because", last.Reason})
		}
	}
	return out
}

func (p *page) Pct() string { return fmtNum(100 * p.Level) }

func (p *page) Chains() int { return p.Run.Chains() }
func (p *page) Len() int    { return p.Run.Len() }

func fmtNum(v float64) string {
	switch {
	case math.IsNaN(v):
		return "–"
	case v == math.Trunc(v) && math.Abs(v) < 1e15:
		return fmt.Sprintf("%.0f", v)
	default:
		return fmt.Sprintf("%.4g", v)
	}
}

var funcs = template.FuncMap{
	"num":  fmtNum,
	"ess":  func(v float64) string { return ifNaN(v, func() string { return fmt.Sprintf("%.0f", v) }) },
	"rhat": func(v float64) string { return ifNaN(v, func() string { return fmt.Sprintf("%.3f", v) }) },
	"high": func(v float64) bool { return v > 1.01 },
	"figure": func(v any) string {
		if v == nil {
			return ""
		}
		if f, ok := v.(float64); ok {
			return fmtNum(f)
		}
		return fmt.Sprint(v)
	},
	"join": strings.Join,
}

func ifNaN(v float64, f func() string) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "–"
	}
	return f()
}

func (p *page) write(path string) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if err := pageTemplate.Execute(f, p); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// The page carries its own styles and one small script (counting the
// pictures that loaded, for checks); it fetches nothing from elsewhere.
var pageTemplate = template.Must(template.New("index").Funcs(funcs).Parse(`<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Run report: {{.Run.Source}}</title>
<style>
body{margin:0;background:#f4efe4;color:#2b2722;font:15px/1.45 "DejaVu Sans","Liberation Sans",sans-serif}
main{max-width:1180px;margin:0 auto;padding:18px 22px 40px}
h1{font-size:22px;margin:8px 0 2px;color:#1d5c63}
h2{font-size:17px;margin:28px 0 8px;padding-bottom:3px;border-bottom:2px solid #d9c9a3;color:#1d5c63}
p.sub{margin:0 0 12px;color:#6b6254}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;margin:0;font-size:13px}
dl.facts dt{color:#6b6254}dl.facts dd{margin:0}
table{border-collapse:collapse;font-size:13px;background:#fbf8f1}
th,td{padding:3px 9px;text-align:right;border-bottom:1px solid #e6dfd0}
th{background:#e9e0cc;font-weight:600}td:first-child,th:first-child{text-align:left}
td.flag{color:#9b2d1f;font-weight:700}
ul.verdict{list-style:none;padding:0;margin:0}
ul.verdict li{margin:4px 0;padding:6px 10px;background:#fbf8f1;border-left:6px solid #8eb1a8}
ul.verdict li.warn{border-left-color:#e0a43a}ul.verdict li.fail{border-left-color:#9b2d1f}
.status{display:inline-block;min-width:3.2em;font-weight:700;text-transform:uppercase;font-size:12px}
figure{margin:8px 0;background:#fbf8f1;padding:6px;border:1px solid #e6dfd0}
figure img{max-width:100%;height:auto;display:block}
figcaption{font-size:12px;color:#6b6254;margin-top:3px}
.row{display:flex;flex-wrap:wrap;gap:10px;align-items:flex-start}
.row figure.trace{flex:7 1 560px}.row figure.marg{flex:4 1 320px}
footer{margin-top:30px;font-size:12px;color:#6b6254}
</style>
</head>
<body>
<main>
<h1>Run report</h1>
<p class="sub">Draws from <code>{{.Run.Source}}</code>: {{len .Run.Names}} parameters, {{.Chains}} chains of {{.Len}} draws{{if .Run.Dropped}} ({{.Run.Dropped}} draws beyond the shortest chain left out){{end}}.
{{if .Run.SummaryPath}}Summary: <code>{{.Run.SummaryPath}}</code>.{{end}} {{if .Run.HistoryPath}}Progress history: <code>{{.Run.HistoryPath}}</code>.{{end}}</p>
{{with .Facts}}<dl class="facts">{{range .}}<dt>{{.Key}}</dt><dd>{{.Value}}</dd>{{end}}</dl>{{end}}

{{with .Run.Verdict}}
<h2>Verdict</h2>
<ul class="verdict">{{range .}}<li class="{{.Status}}"><span class="status">{{.Status}}</span> <b>{{.Name}}</b>{{with figure .Figure}} ({{.}}){{end}}: {{.Sentence}}</li>{{end}}</ul>
{{end}}

<h2>Parameters</h2>
<table>
<tr><th>parameter</th><th>mean</th><th>sd</th><th>{{.Pct}}% interval from</th><th>median</th><th>to</th><th>R-hat</th><th>bulk ESS</th><th>tail ESS</th></tr>
{{range .Stats}}<tr><td>{{.Name}}</td><td>{{num .Mean}}</td><td>{{num .SD}}</td><td>{{num .Lo}}</td><td>{{num .Median}}</td><td>{{num .Hi}}</td><td{{if high .Rhat}} class="flag"{{end}}>{{rhat .Rhat}}</td><td>{{ess .BulkESS}}</td><td>{{ess .TailESS}}</td></tr>
{{end}}</table>
<p class="sub">Computed here from the draws in the file: equal-tailed interval of the pooled draws; split-rank R-hat (flagged above 1.01) and bulk/tail effective sample size.</p>

{{if .Progress}}
<h2>How the run went</h2>
<figure><img src="{{.Progress}}.png" alt="running R-hat, effective sample size, Stein discrepancy and bound against evaluations spent">
<figcaption>Each figure of the progress history against the evaluations spent; dashed lines are the run's aims. <a href="{{.Progress}}.svg">SVG</a></figcaption></figure>
{{end}}

{{if .Overview}}
<h2>All parameters at a glance</h2>
<figure><img src="{{.Overview}}.png" alt="R-hat and effective sample size of every parameter">
<figcaption>One mark per parameter, numbered as in the table; dashed lines: {{.OverviewAims}}. <a href="{{.Overview}}.svg">SVG</a></figcaption></figure>
{{end}}

<h2>Each parameter{{with .DetailNote}}: {{.}}{{end}}</h2>
{{range .Params}}
<div class="row">
<figure class="trace"><img src="{{.Trace}}.png" alt="draws of {{.Name}} in order, one line per chain"><figcaption>{{.Name}}: draws in order, one line per chain. <a href="{{.Trace}}.svg">SVG</a></figcaption></figure>
<figure class="marg"><img src="{{.Marginal}}.png" alt="histogram of {{.Name}}"><figcaption>{{.Name}}: all chains pooled, the {{$.Pct}}% interval shaded. <a href="{{.Marginal}}.svg">SVG</a></figcaption></figure>
</div>
{{end}}

{{if .Pairs}}
<h2>Parameters two by two</h2>
<figure><img src="{{.Pairs}}.png" alt="pairwise scatter plots of {{join .PairNames ", "}}" style="max-width:760px">
<figcaption>{{join .PairNames ", "}}: each parameter's histogram on the diagonal, draws of two parameters against each other below it. <a href="{{.Pairs}}.svg">SVG</a></figcaption></figure>
{{end}}

<footer>Made by <code>sluice report</code>. These draws are approximate and the diagnostics cannot prove convergence; validate before relying on them.</footer>
</main>
<script>
window.addEventListener("load", function () {
  var n = 0, im = document.images;
  for (var i = 0; i < im.length; i++) { if (im[i].complete && im[i].naturalWidth > 0) { n++; } }
  document.body.dataset.loaded = String(n);
  document.body.dataset.images = String(im.length);
});
</script>
</body>
</html>
`))
