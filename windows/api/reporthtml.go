package api

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"html/template"
	"io"
	"net/http"
	"net/url"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api/chart"
	"github.com/classwatch/classwatch/windows/store"
)

// FormatHTML is the audit report as one self-contained HTML document.
const FormatHTML = "html"

// reportPrintCSS lays the report out for paper: A4 or Letter, tables and
// pictures never cut across pages.
const reportPrintCSS = `
.doc { max-width:60rem; margin:0 auto; padding:1rem 1.25rem 2rem; }
.meta th { text-align:left; }
.fp { font-family:ui-monospace,"DejaVu Sans Mono",monospace; font-size:.85rem; word-break:break-all; white-space:normal; }
.empty { font-size:1.1rem; font-weight:600; border:2px dashed var(--accent); padding:.8rem 1rem; background:#fff; }
.cw-chart { max-width:100%; height:auto; }
table.perclass th { white-space:normal; max-width:7rem; vertical-align:bottom; }
@page { size:auto; margin:14mm 12mm; }
@media print {
  body { background:#fff; font-size:9.5pt; }
  .doc { max-width:none; padding:0; }
  table, figure, .caution, .alerts li, section.keep { break-inside:avoid; page-break-inside:avoid; }
  tr { break-inside:avoid; page-break-inside:avoid; }
  thead { display:table-header-group; }
  h2 { break-after:avoid; page-break-after:avoid; }
  a { color:inherit; text-decoration:none; }
  th, td { padding:.1rem .35rem; }
}
`

// reportHTML is the audit report document.
const reportHTML = `<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Audit report · {{.A.Model}} · {{rfc .A.From}} to {{rfc .A.To}}</title>
<link rel="icon" href="data:,">
<style>{{css}}{{printcss}}</style>
</head>
<body><div class="doc">
<h1>Audit report · {{.A.Model}}</h1>
<table class="meta">
<tr><th>model</th><td class="l">{{.A.Model}}</td></tr>
<tr><th>period</th><td class="l">predictions made in [{{rfc .A.From}}, {{rfc .A.To}})</td></tr>
<tr><th>labels as of</th><td class="l">{{.AsOf}}{{if not .Explicit}} (the time the report was made: the labels known then){{end}}</td></tr>
<tr><th>segment</th><td class="l">{{if .A.Segment}}{{deref .A.Segment}}{{else}}all segments{{end}}</td></tr>
<tr><th>generated</th><td class="l">{{.Generated}}</td></tr>
<tr><th>intervals</th><td class="l">Wilson score, {{.Confidence}}</td></tr>
<tr><th>fingerprint</th><td class="l fp">sha256:{{.A.Fingerprint}}</td></tr>
</table>
<p class="caution">These figures are evidence about how the model behaved on the predictions logged in this period and the labels known at the as-of time; they are not a validation of the model. Where the model's use is regulated, the regulations and licensed practice that govern it decide what is adequate.</p>
{{if not .A.Predictions}}<p class="empty">No prediction was logged in this period{{if .A.Segment}} for this segment{{end}}: there are no figures to report.</p>{{else}}
<section class="keep"><h2>Summary</h2>
<table><tbody>
<tr><th>predictions</th><td>{{.A.Predictions}}</td></tr>
<tr><th>labeled</th><td>{{.A.Labeled}}</td></tr>
{{range .Summary}}<tr><th>{{.Title}}</th><td>{{.Value}}</td></tr>
{{end}}</tbody></table></section>
<section class="keep"><h2>Confusion matrix</h2>
<p class="note">Rows are the actual class, columns the predicted class. Framed cells are correct predictions. The second picture shows each row's shares: its diagonal is the class's recall.</p>
<div class="grid"><figure><figcaption>counts</figcaption>{{.Counts}}</figure><figure><figcaption>share of each actual row</figcaption>{{.Shares}}</figure></div></section>
<section><h2>Per class</h2>
<p class="note">Each figure with its {{.Confidence}} Wilson interval below it where it has one; support counts the labeled examples of the class, predicted its predictions.</p>
{{range .ClassTables}}<table class="perclass"><thead><tr><th>class</th><th>support</th><th>predicted</th>{{range .Cols}}<th>{{.}}</th>{{end}}</tr></thead><tbody>
{{range .Rows}}<tr><td class="l">{{.Name}}</td><td>{{.Support}}</td><td>{{.Predictions}}</td>{{range .Cells}}<td>{{.Value}}{{if .Interval}}<br><span class="muted note">{{.Interval}}</span>{{end}}</td>{{end}}</tr>
{{end}}</tbody></table>
{{end}}
<div class="grid"><figure><figcaption>recall per class</figcaption>{{.Recall}}</figure><figure><figcaption>precision per class</figcaption>{{.Precision}}</figure></div></section>
<section><h2>History</h2>
<p class="note">One point per {{.A.HistoryStep}}, with the Wilson interval as a band; labels as of {{.AsOf}}.</p>
<table><thead><tr><th>from</th><th>predictions</th><th>labeled</th><th>coverage</th></tr></thead><tbody>
{{range .Steps}}<tr><td class="l">{{.From}}</td><td>{{.Predictions}}</td><td>{{.Labeled}}</td><td>{{.Coverage}}</td></tr>
{{end}}</tbody></table>
<table><thead><tr><th>class</th><th class="l">recall</th><th class="l">prevalence</th></tr></thead><tbody>
{{range .Trends}}<tr><td class="l">{{.Class}}</td><td class="l">{{.Recall}}</td><td class="l">{{.Prevalence}}</td></tr>
{{end}}</tbody></table></section>
{{end}}
<section class="keep"><h2>Label coverage and label delay</h2>
<p>{{.A.Labeled}} of {{.A.Predictions}} predictions have a label known at the as-of time (coverage {{.Coverage}}). The picture shows the time from each prediction to its first real label version; {{.A.LabelDelays.WithoutRealLabel}} predictions have none (unlabeled, or labeled only by the default after the label timeout).</p>
{{.Delays}}</section>
<section><h2>Alerts that fired in the period</h2>
{{if .A.AlertsFired}}<table><thead><tr><th>fired at</th><th class="l">rule</th><th class="l">class</th><th class="l">window</th><th>value</th><th>interval</th><th>threshold</th></tr></thead><tbody>
{{range .A.AlertsFired}}<tr><td class="l">{{rfc .At}}</td><td class="l">{{.Rule}}</td><td class="l">{{.Class}}{{if .Predicted}} → {{.Predicted}}{{end}}</td><td class="l">{{.Window}}</td><td>{{ratio .Value}}</td><td>{{ci .Interval}}</td><td>{{ratio .Threshold}}</td></tr>
{{end}}</tbody></table>{{else}}<p>No alert on this model entered the firing state in the period (alert history).</p>{{end}}</section>
<section><h2>What changed since the as-of time</h2>
{{if not .A.Changes}}<p>The report reads the labels known when it was made; nothing to compare.</p>
{{else if not (deref2 .A.Changes)}}<p>No cell moved between {{.AsOf}} and {{.Generated}}.</p>
{{else}}<p>Cells whose count moved between {{.AsOf}} and {{.Generated}} (late labels and corrections):</p>
<table><thead><tr><th class="l">actual</th><th class="l">predicted</th><th>as of</th><th>at generation</th><th>change</th></tr></thead><tbody>
{{range deref2 .A.Changes}}<tr><td class="l">{{.Actual}}</td><td class="l">{{.Predicted}}</td><td>{{.AsOf}}</td><td>{{.Now}}</td><td>{{delta .AsOf .Now}}</td></tr>
{{end}}</tbody></table>{{end}}</section>
<section class="keep"><h2>Verify status</h2>
<p><span class="tag {{if eq .A.Verify.Status "match"}}ok{{else}}firing{{end}}">{{.A.Verify.Status}}</span> {{.A.Verify.Detail}}.</p></section>
<section class="keep"><h2>Reproducing this report</h2>
<p>The fingerprint is the SHA-256 of the RFC 8785 canonical JSON of these members of the embedded data block (<code>classwatch-report</code>): {{.Fields}}. A report of the same model, period and segment made later with the as-of time set to {{.AsOf}} has the same fingerprint while the raw rows of the period are kept:</p>
<p><code>{{.Command}}</code><br><code>GET {{.URL}}</code></p></section>
<script type="application/json" id="classwatch-report">{{.JSON}}</script>
</div></body>
</html>`

type reportPage struct {
	A                 Audit
	AsOf, Generated   string
	Explicit          bool
	Confidence        string
	Coverage          string
	Summary           []titled
	ClassTables       []classTable
	Counts, Shares    template.HTML
	Recall, Precision template.HTML
	Steps             []reportStep
	Trends            []classHistory
	Delays            template.HTML
	Fields            string
	Command, URL      string
	JSON              template.JS
}

type titled struct{ Title, Value string }

// classTable is one table of per-class figures: the class-scope metrics
// are split into tables of classColumns columns so that each fits a page.
type classTable struct {
	Cols []string
	Rows []reportClass
}

// classColumns is how many metrics one per-class table holds.
const classColumns = 5

type reportClass struct {
	Name                 string
	Support, Predictions int64
	Cells                []classCell
}

type classCell struct{ Value, Interval string }

type reportStep struct {
	From                 string
	Predictions, Labeled int64
	Coverage             string
}

func parseReport() *template.Template {
	funcs := pageFuncs()
	funcs["printcss"] = func() template.CSS { return template.CSS(reportPrintCSS) }
	funcs["deref"] = func(s *string) string { return *s }
	funcs["deref2"] = func(c *[]CellChange) []CellChange { return *c }
	funcs["delta"] = func(a, b int64) string { return fmt.Sprintf("%+d", b-a) }
	return template.Must(template.New("report").Funcs(funcs).Parse(reportHTML))
}

// WriteAuditHTML writes au as one self-contained HTML document.
func WriteAuditHTML(w io.Writer, au Audit) error {
	page, err := newReportPage(au)
	if err != nil {
		return err
	}
	var buf bytes.Buffer
	if err := parseReport().Execute(&buf, page); err != nil {
		return fmt.Errorf("render report: %w", err)
	}
	if _, err := w.Write(buf.Bytes()); err != nil {
		return fmt.Errorf("write report: %w", err)
	}
	return nil
}

func newReportPage(au Audit) (reportPage, error) {
	data, err := json.Marshal(au) // HTML-safe: <, > and & are escaped
	if err != nil {
		return reportPage{}, fmt.Errorf("encode report data: %w", err)
	}
	p := reportPage{
		A: au, AsOf: au.AsOf.Format(time.RFC3339Nano), Generated: au.Generated.Format(time.RFC3339Nano), Explicit: au.Changes != nil,
		Confidence: strconv.FormatFloat(100*au.Confidence, 'g', -1, 64) + "%",
		Coverage:   htmlNum(au.Metrics.Values["label_coverage"]),
		Fields:     strings.Join(FingerprintFields(), ", "),
		JSON:       template.JS(data),
	}
	p.Command, p.URL = reproduce(au)
	var classDefs []windows.MetricDef
	for _, d := range windows.MetricDefs() {
		if d.Scope == windows.ScopeWindow {
			p.Summary = append(p.Summary, titled{d.Title, htmlNum(au.Metrics.Values[d.Name])})
		} else {
			classDefs = append(classDefs, d)
		}
	}
	for chunk := range slices.Chunk(classDefs, classColumns) {
		var tab classTable
		for _, d := range chunk {
			tab.Cols = append(tab.Cols, d.Title)
		}
		for _, c := range au.Classes {
			cf := au.Metrics.PerClass[c]
			rc := reportClass{Name: c, Support: cf.Support, Predictions: cf.Predictions}
			for _, d := range chunk {
				rc.Cells = append(rc.Cells, classCell{Value: htmlNum(cf.Values[d.Name]), Interval: htmlIntervalOpt(cf.Intervals[d.Name])})
			}
			tab.Rows = append(tab.Rows, rc)
		}
		p.ClassTables = append(p.ClassTables, tab)
	}
	p.drawFigures(au)
	return p, nil
}

func (p *reportPage) drawFigures(au Audit) {
	label := au.Model + " " + rfc(au.From) + " to " + rfc(au.To)
	p.Counts = chart.DrawHeatmap(chart.Heatmap{Classes: au.Classes, Matrix: au.Matrix, Label: label + " confusion counts"})
	p.Shares = chart.DrawHeatmap(chart.Heatmap{Classes: au.Classes, Matrix: au.Matrix, Mode: chart.RowShare, Label: label + " row shares"})
	p.Recall = chart.DrawIntervals(classIntervals(au.Figures, label+" recall", nil, nil, true))
	p.Precision = chart.DrawIntervals(classIntervals(au.Figures, label+" precision", nil, nil, false))
	for _, h := range au.History {
		p.Steps = append(p.Steps, reportStep{From: rfc(h.From), Predictions: h.Predictions, Labeled: h.Labeled, Coverage: ratioOf(h.Labeled, h.Predictions)})
	}
	for _, c := range au.Classes {
		var rec, prev []chart.Point
		for _, h := range au.History {
			pc := h.PerClass[c]
			rec = append(rec, chart.Point{At: h.From, Value: pc.Recall, Interval: pc.RecallInterval})
			prev = append(prev, chart.Point{At: h.From, Value: pc.Prevalence, Interval: pc.PrevalenceInterval})
		}
		p.Trends = append(p.Trends, classHistory{Class: c,
			Recall:     chart.DrawTrend(chart.Trend{Label: c + " recall", Points: rec, Max: 1, Width: 320}),
			Prevalence: chart.DrawTrend(chart.Trend{Label: c + " prevalence", Points: prev, Width: 320})})
	}
	bars := make([]chart.Bar, len(au.LabelDelays.Bins))
	for i, b := range au.LabelDelays.Bins {
		bars[i] = chart.Bar{Label: b, N: au.LabelDelays.Counts[i]}
	}
	p.Delays = chart.DrawHistogram(chart.Histogram{Label: "time from prediction to first label", Bars: bars})
}

func ratioOf(x, n int64) string {
	if n == 0 {
		return "–"
	}
	return strconv.FormatFloat(float64(x)/float64(n), 'f', 3, 64)
}

// reproduce returns the command and the request that make this report
// again with the same as-of time.
func reproduce(au Audit) (cmd, path string) {
	asOf := au.AsOf.Format(time.RFC3339Nano)
	cmd = "classwatch audit --model " + shellQuote(au.Model) + " --from " + rfc(au.From) + " --to " + rfc(au.To) + " --as-of " + asOf
	q := url.Values{"from": {rfc(au.From)}, "to": {rfc(au.To)}, "as_of": {asOf}}
	if au.Segment != nil {
		cmd += " --segment " + shellQuote(*au.Segment)
		q.Set("segment", *au.Segment)
	}
	return cmd + " --format html", "/v1/models/" + url.PathEscape(au.Model) + "/report?" + q.Encode()
}

// shellQuote quotes s for a POSIX shell when it needs it.
func shellQuote(s string) string {
	if s != "" && strings.Trim(s, "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_.:/") == "" {
		return s
	}
	return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'"
}

// handleReport answers GET /v1/models/{model}/report with the audit
// report as an HTML document; errors are small HTML pages with the status
// and message the matrix endpoint gives.
func (a *API) handleReport(w http.ResponseWriter, r *http.Request) {
	q, err := a.matrixQuery(r)
	if err == nil {
		var au Audit
		au, err = BuildAudit(r.Context(), a.store, q, a.now(), a.confidence)
		if err == nil {
			var buf bytes.Buffer
			if err := WriteAuditHTML(&buf, au); err != nil {
				a.log.ErrorContext(r.Context(), "render report", "err", err)
				a.pageError(w, r, http.StatusInternalServerError, "Report failed", "The report could not be rendered; see the daemon's log.")
				return
			}
			w.Header().Set("Content-Type", "text/html; charset=utf-8")
			w.Write(buf.Bytes())
			return
		}
	}
	switch {
	case isRequestError(err):
		a.pageError(w, r, http.StatusBadRequest, "Bad report request", err.Error())
	case errors.Is(err, store.ErrUnknownModel):
		a.pageError(w, r, http.StatusNotFound, "Unknown model", "No model named "+quote(q.Model)+" has been seen.")
	case errors.Is(err, context.Canceled):
	default:
		a.log.ErrorContext(r.Context(), "build report", "err", err)
		a.pageError(w, r, http.StatusServiceUnavailable, "Store unavailable", "The report could not be read from the store; see the daemon's log.")
	}
}
