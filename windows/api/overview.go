package api

import (
	"bytes"
	"fmt"
	"html/template"
	"net/http"
	"net/url"
	"strconv"
	"time"
)

// overviewHTML is the HTML overview's template: self-contained, no scripts,
// no external assets.
const overviewHTML = `<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>classwatch</title>
<style>
body { font: 14px/1.45 system-ui, sans-serif; color: #1d2330; background: #f7f7f5; margin: 0; }
header, main, footer { max-width: 72rem; margin: 0 auto; padding: 0 1.25rem; }
header { padding-top: 1.5rem; }
h1 { font-size: 1.4rem; margin: 0 0 .25rem; }
h2 { font-size: 1.15rem; margin: 2rem 0 .25rem; }
h3 { font-size: 1rem; margin: 1.25rem 0 .35rem; }
.muted { color: #667085; }
.caution { border-left: 3px solid #c98a1b; background: #fdf6e8; padding: .5rem .75rem; margin: .75rem 0; }
section.model { background: #fff; border: 1px solid #e3e3de; border-radius: 6px; padding: .25rem 1rem 1rem; margin: 1rem 0; }
table { border-collapse: collapse; margin: .25rem 0 .5rem; }
th, td { padding: .2rem .6rem; border-bottom: 1px solid #ecece8; text-align: right; white-space: nowrap; }
th:first-child, td:first-child { text-align: left; }
th { font-weight: 600; color: #475467; }
dl { display: grid; grid-template-columns: max-content auto; gap: .1rem 1rem; margin: .5rem 0; }
dt { color: #667085; }
dd { margin: 0; }
a { color: #1f5fa8; }
code { font-size: .92em; }
footer { padding: 1rem 1.25rem 2rem; }
</style>
</head>
<body>
<header>
<h1>classwatch</h1>
<p class="muted">Confusion matrices of logged predictions joined with their labels, per rolling window. Generated {{.Generated}}.</p>
<p class="caution">Monitoring figures are evidence about how a model behaved on the traffic it saw and the labels known so far; they are not a validation of the model.</p>
<p>JSON: <a href="/v1/models">/v1/models</a> · <a href="/v1/alerts">/v1/alerts</a> · Prometheus: <a href="/metrics">/metrics</a> · Intervals: Wilson score, {{.Confidence}}.</p>
</header>
<main>
{{if .Error}}<p class="caution">Could not list the models: {{.Error}}.</p>{{end}}
{{if not .Models}}<p class="muted">No model has been seen yet.</p>{{end}}
{{range .Models}}
<section class="model">
<h2>{{.Name}}</h2>
<dl>
<dt>classes</dt><dd>{{range $i, $c := .Classes}}{{if $i}}, {{end}}{{$c}}{{end}}</dd>
<dt>watermark</dt><dd>{{.Watermark}}</dd>
<dt>predictions</dt><dd>{{.Predictions}} ({{.Labeled}} labeled, coverage {{.Coverage}})</dd>
<dt>JSON</dt><dd><a href="{{.WindowsLink}}">windows</a></dd>
</dl>
{{range .Windows}}
<h3>Window {{.Name}} <span class="muted">— length {{.Length}}, lag {{.Lag}}, buckets [{{.From}}, {{.To}})</span></h3>
<p>{{.Predictions}} predictions, {{.Labeled}} labeled (coverage {{.Coverage}}) · accuracy {{.Accuracy}} · balanced accuracy {{.Balanced}} · macro F1 {{.MacroF1}}{{if .MatrixLink}} · <a href="{{.MatrixLink}}">matrix JSON</a>{{end}}</p>
{{if .Classes}}
<table>
<thead><tr><th>class</th><th>support</th><th>predictions</th><th>recall</th><th>interval</th><th>precision</th><th>interval</th><th>prevalence</th><th>predicted share</th></tr></thead>
<tbody>
{{range .Classes}}<tr><td>{{.Name}}</td><td>{{.Support}}</td><td>{{.Predictions}}</td><td>{{.Recall}}</td><td class="muted">{{.RecallCI}}</td><td>{{.Precision}}</td><td class="muted">{{.PrecisionCI}}</td><td>{{.Prevalence}}</td><td>{{.PredictedShare}}</td></tr>
{{end}}</tbody>
</table>
{{end}}
{{else}}<p class="muted">No windows configured.</p>
{{end}}
</section>
{{end}}
</main>
<footer class="muted">A figure shown as — is undefined: its denominator is zero in that window.</footer>
</body>
</html>
`

// parseOverview parses overviewHTML; it fails only if the constant above
// is broken, which every test run would show.
func parseOverview() *template.Template {
	return template.Must(template.New("overview").Parse(overviewHTML))
}

type overviewPage struct {
	Generated  string
	Confidence string
	Error      string
	Models     []overviewModel
}

type overviewModel struct {
	Name                 string
	Classes              []string
	Watermark            string
	Predictions, Labeled int64
	Coverage             string
	WindowsLink          string
	Windows              []overviewWindow
}

type overviewWindow struct {
	Name, Length, Lag, From, To  string
	MatrixLink                   string
	Predictions, Labeled         int64
	Coverage, Accuracy, Balanced string
	MacroF1                      string
	Classes                      []overviewClass
}

type overviewClass struct {
	Name                                     string
	Support, Predictions                     int64
	Recall, RecallCI, Precision, PrecisionCI string
	Prevalence, PredictedShare               string
}

// handleOverview renders the HTML overview from the store's model list and
// the tracker's windows.
func (a *API) handleOverview(w http.ResponseWriter, r *http.Request) {
	page := overviewPage{
		Generated:  a.now().UTC().Format(time.RFC3339),
		Confidence: strconv.FormatFloat(100*a.confidence, 'g', -1, 64) + "%",
	}
	models, err := a.models(r.Context())
	if err != nil {
		a.log.WarnContext(r.Context(), "overview: list models", "err", err)
		page.Error = "the store did not answer; see the daemon's log"
	}
	for _, m := range models {
		om := overviewModel{
			Name:        m.Name,
			Classes:     m.Classes,
			Watermark:   timeText(m.Watermark),
			Predictions: m.Predictions,
			Labeled:     m.Labeled,
			Coverage:    htmlNum(m.LabelCoverage),
			WindowsLink: "/v1/models/" + url.PathEscape(m.Name) + "/windows",
		}
		for _, v := range a.tracker.Views(m.Name) {
			f := NewFigures(v.Matrix, v.Predicted, a.confidence)
			ow := overviewWindow{
				Name:        v.Window.Name,
				Predictions: f.Predictions,
				Labeled:     f.Labeled,
				Coverage:    htmlNum(f.Metrics.Values["label_coverage"]),
				Accuracy:    htmlNum(f.Metrics.Values["accuracy"]),
				Balanced:    htmlNum(f.Metrics.Values["balanced_accuracy"]),
				MacroF1:     htmlNum(f.Metrics.Values["macro_f1"]),
			}
			b := bounds(v.Window, v.Watermark)
			ow.Length, ow.Lag, ow.From, ow.To = b.Length, b.Lag, timeText(b.From), timeText(b.To)
			if b.From != nil {
				q := url.Values{"from": {b.From.Format(time.RFC3339)}, "to": {b.To.Format(time.RFC3339)}}
				ow.MatrixLink = "/v1/models/" + url.PathEscape(m.Name) + "/matrix?" + q.Encode()
			}
			for _, c := range f.Classes {
				cf := f.Metrics.PerClass[c]
				ow.Classes = append(ow.Classes, overviewClass{
					Name:           c,
					Support:        cf.Support,
					Predictions:    cf.Predictions,
					Recall:         htmlNum(cf.Values["recall"]),
					RecallCI:       htmlInterval(cf.Intervals["recall"]),
					Precision:      htmlNum(cf.Values["precision"]),
					PrecisionCI:    htmlInterval(cf.Intervals["precision"]),
					Prevalence:     htmlNum(cf.Values["prevalence"]),
					PredictedShare: htmlNum(cf.Values["predicted_share"]),
				})
			}
			om.Windows = append(om.Windows, ow)
		}
		page.Models = append(page.Models, om)
	}
	var buf bytes.Buffer
	if err := a.overview.Execute(&buf, page); err != nil {
		a.log.ErrorContext(r.Context(), "overview: render", "err", err)
		http.Error(w, "cannot render the overview", http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Write(buf.Bytes())
}

func htmlNum(v *float64) string {
	if v == nil {
		return "—"
	}
	return strconv.FormatFloat(*v, 'f', 3, 64)
}

func htmlInterval(iv *[2]float64) string {
	if iv == nil {
		return "—"
	}
	return fmt.Sprintf("%.3f–%.3f", iv[0], iv[1])
}

func timeText(t *time.Time) string {
	if t == nil {
		return "—"
	}
	return t.UTC().Format(time.RFC3339)
}
