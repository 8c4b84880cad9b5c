package api

import (
	"cmp"
	"context"
	"net/http"
	"net/url"
	"slices"
	"strconv"
	"time"

	"github.com/classwatch/classwatch/windows"
)

// overviewContent is the on-call overview (README "Pages and the audit
// report"): active alerts first, then one compact block per model.
const overviewContent = `{{define "content"}}
<h1>On call</h1>
{{if .Error}}<p class="caution">{{.Error}}</p>{{end}}
<h2>Alerts {{if .Firing}}<span class="tag firing">{{.Firing}} firing</span>{{end}} {{if .Pending}}<span class="tag pending">{{.Pending}} pending</span>{{end}}</h2>
{{if .Alerts}}<ul class="alerts">
{{range .Alerts}}<li class="{{.State}}"><span><span class="tag {{.State}}">{{.State}}</span></span>
<span><b>{{.Rule}}</b> on <a href="{{.Link}}">{{.Model}}</a> · {{.Subject}}{{if .Window}} · window {{.Window}}{{end}}<br>
{{if .Metric}}{{.Metric}} {{end}}<b>{{.Value}}</b>{{if .Interval}} <span class="muted">({{.Confidence}} interval {{.Interval}})</span>{{end}}{{if .Threshold}} · threshold {{.Threshold}}{{end}} · {{.State}} since {{.Since}} <span class="muted">({{.SinceAgo}})</span></span></li>
{{end}}</ul>
{{else}}<p><span class="tag ok">quiet</span> No alert is firing or pending.</p>{{end}}

<h2>Models <span class="muted note">{{len .Models}} · alerting first, then by name</span></h2>
<p class="note"><dfn>watermark</dfn>: the end of the bucket holding a model's latest prediction; every window ends at it (minus its lag).
A <dfn>matured</dfn> window has a lag: it ends that long before the watermark, so that late labels have had time to arrive.
<dfn>Worst classes</dfn> are the lowest recall first, with the Wilson score interval at {{.Confidence}}; n is the number of labeled examples of the class.
Figures marked <dfn>all time</dfn> count everything stored for the model, not a window.</p>
{{if .Models}}<table class="models">
<thead><tr><th>model</th><th class="l">window</th><th>predictions</th><th>labeled</th><th>coverage</th><th>balanced acc.</th><th class="l">worst classes · recall (interval) n</th></tr></thead>
<tbody>
{{range .Models}}{{$m := .}}
<tr class="first"><td class="model l" rowspan="{{.Rows}}"><a href="{{.Link}}">{{.Name}}</a>
{{if .Firing}}<br><span class="tag firing">{{.Firing}} firing</span>{{end}}{{if .Pending}}<br><span class="tag pending">{{.Pending}} pending</span>{{end}}</td>
<td class="l wrap" colspan="6">last prediction <span{{if .StalePrediction}} class="stale" title="older than the shortest window"{{end}}>{{.LastPrediction}}</span> · last label <span{{if .StaleLabel}} class="stale" title="older than the longest window"{{end}}>{{.LastLabel}}</span> · watermark {{.Watermark}} · all time: {{.Predictions}} predictions, {{.Labeled}} labeled ({{.Coverage}}) · {{.ClassCount}} classes</td></tr>
{{range .Windows}}<tr><td class="l">{{.Name}}{{if .Matured}}<br><span class="note" title="ends {{.Lag}} before the watermark">matured, lag {{.Lag}}</span>{{end}}</td>
<td>{{.Predictions}}</td><td>{{.Labeled}}</td><td>{{.Coverage}}</td><td>{{.Balanced}}</td>
<td class="l worst">{{range .Worst}}<span>{{if .Alert}}<span class="tri" title="an alert names this class">▲</span> {{end}}{{.Name}} <b>{{.Recall}}</b> <span class="muted">({{.CI}}) n={{.N}}</span></span>{{else}}<span class="muted">no labeled example</span>{{end}}{{if .More}}<a class="note" href="{{$m.Link}}">+{{.More}} more</a>{{end}}</td></tr>
{{end}}{{end}}
</tbody></table>
{{else}}<p class="muted">No model has been seen yet.</p>{{end}}
{{end}}`

type overviewPage struct {
	pageHead
	Confidence      string
	Error           string
	Alerts          []alertRow
	Firing, Pending int
	Models          []overviewModel
}

type alertRow struct {
	alertView
	Link, Value, Interval, Threshold, Since, SinceAgo, Confidence string
}

type overviewModel struct {
	Name, Link                  string
	Firing, Pending             int
	LastPrediction, LastLabel   string
	StalePrediction, StaleLabel bool
	Watermark                   string
	Predictions, Labeled        int64
	Coverage                    string
	ClassCount                  int
	Windows                     []overviewWindow
}

// Rows is the number of table rows the model takes.
func (m overviewModel) Rows() int { return len(m.Windows) + 1 }

type overviewWindow struct {
	Name, Lag            string
	Matured              bool
	Predictions, Labeled int64
	Coverage, Balanced   string
	Worst                []worstClass
	More                 int
}

type worstClass struct {
	Name, Recall, CI string
	N                int64
	Alert            bool
}

// overviewWorst is how many classes a window row lists.
const overviewWorst = 3

// handleOverview renders the on-call overview.
func (a *API) handleOverview(w http.ResponseWriter, r *http.Request) {
	a.render(w, r, a.pages.overview, http.StatusOK, a.overview(r.Context()))
}

func (a *API) overview(ctx context.Context) overviewPage {
	now := a.now().UTC()
	page := overviewPage{
		pageHead:   pageHead{Title: "on call", Generated: now.Format(time.RFC3339)},
		Confidence: strconv.FormatFloat(100*a.confidence, 'g', -1, 64) + "%",
	}
	alerts, err := a.activeAlerts(ctx)
	if err != nil {
		a.log.WarnContext(ctx, "overview: read alerts", "err", err)
		page.Error = "The alert state could not be read; see the daemon's log. "
	}
	models, err := a.models(ctx)
	if err != nil {
		a.log.WarnContext(ctx, "overview: list models", "err", err)
		page.Error += "The store did not answer the model list; see the daemon's log."
	}
	latestLabels, err := a.labels.get(ctx, a.store, now)
	if err != nil {
		a.log.WarnContext(ctx, "overview: read latest labels", "err", err)
	}
	alerting := map[string]map[string]bool{} // model → class → alerting
	counts := map[string][2]int{}
	for _, al := range alerts {
		row := alertRow{
			alertView: al, Link: modelLink(al.Model), Value: htmlNum(al.Result.Value), Since: al.Since().UTC().Format(time.RFC3339),
			SinceAgo: ago(now, al.Since()), Confidence: page.Confidence, Threshold: optNum(al.Result.Threshold),
		}
		if al.Result.Interval != nil {
			row.Interval = htmlInterval(al.Result.Interval)
		}
		page.Alerts = append(page.Alerts, row)
		c := counts[al.Model]
		if al.State == "firing" {
			page.Firing++
			c[0]++
		} else {
			page.Pending++
			c[1]++
		}
		counts[al.Model] = c
		if alerting[al.Model] == nil {
			alerting[al.Model] = map[string]bool{}
		}
		alerting[al.Model][al.Class] = true
	}
	for _, m := range models {
		om := a.overviewModel(m, now, latestLabels[m.Name], alerting[m.Name])
		om.Firing, om.Pending = counts[m.Name][0], counts[m.Name][1]
		page.Models = append(page.Models, om)
	}
	slices.SortStableFunc(page.Models, func(x, y overviewModel) int {
		return cmp.Or(-cmp.Compare(x.Firing, y.Firing), -cmp.Compare(x.Pending, y.Pending))
	})
	return page
}

func (a *API) overviewModel(m ModelSummary, now, lastLabel time.Time, alerting map[string]bool) overviewModel {
	var lastPred time.Time
	if m.LatestPredictionAt != nil {
		lastPred = *m.LatestPredictionAt
	}
	om := overviewModel{
		Name: m.Name, Link: modelLink(m.Name),
		LastPrediction: ago(now, lastPred), LastLabel: ago(now, lastLabel),
		Watermark:   timeText(m.Watermark),
		Predictions: m.Predictions, Labeled: m.Labeled, Coverage: htmlNum(m.LabelCoverage),
		ClassCount: len(m.Classes),
	}
	var shortest, longest time.Duration
	for _, v := range a.tracker.Views(m.Name) {
		span := v.Window.Length + v.Window.Lag
		if shortest == 0 || v.Window.Length < shortest {
			shortest = v.Window.Length
		}
		longest = max(longest, span)
		f := NewFigures(v.Matrix, v.Predicted, a.confidence)
		ow := overviewWindow{
			Name: v.Window.Name, Lag: windows.FormatDuration(v.Window.Lag), Matured: v.Window.Lag > 0,
			Predictions: f.Predictions, Labeled: f.Labeled,
			Coverage: htmlNum(f.Metrics.Values["label_coverage"]), Balanced: htmlNum(f.Metrics.Values["balanced_accuracy"]),
		}
		worst := worstFirst(f)
		if len(worst) > overviewWorst {
			ow.More = len(worst) - overviewWorst
			worst = worst[:overviewWorst]
		}
		for _, c := range worst {
			cf := f.Metrics.PerClass[c]
			ow.Worst = append(ow.Worst, worstClass{Name: c, Recall: htmlNum(cf.Values["recall"]), CI: htmlInterval(cf.Intervals["recall"]), N: cf.Support, Alert: alerting[c]})
		}
		om.Windows = append(om.Windows, ow)
	}
	om.StalePrediction = !lastPred.IsZero() && shortest > 0 && now.Sub(lastPred) > shortest
	om.StaleLabel = !lastLabel.IsZero() && longest > 0 && now.Sub(lastLabel) > longest
	return om
}

// worstFirst orders the classes with a defined recall from the lowest
// recall up (ties: fewer examples first); classes without a labeled
// example are left out.
func worstFirst(f Figures) []string {
	var out []string
	for _, c := range f.Classes {
		if f.Metrics.PerClass[c].Values["recall"] != nil {
			out = append(out, c)
		}
	}
	slices.SortStableFunc(out, func(x, y string) int {
		cx, cy := f.Metrics.PerClass[x], f.Metrics.PerClass[y]
		return cmp.Or(cmp.Compare(*cx.Values["recall"], *cy.Values["recall"]), cmp.Compare(cx.Support, cy.Support))
	})
	return out
}

func modelLink(model string) string { return "/models/" + url.PathEscape(model) }

func optNum(v *float64) string {
	if v == nil {
		return ""
	}
	return strconv.FormatFloat(*v, 'g', 4, 64)
}

func htmlNum(v *float64) string {
	if v == nil {
		return "–"
	}
	return strconv.FormatFloat(*v, 'f', 3, 64)
}

func htmlInterval(iv *[2]float64) string {
	if iv == nil {
		return "–"
	}
	return strconv.FormatFloat(iv[0], 'f', 3, 64) + "–" + strconv.FormatFloat(iv[1], 'f', 3, 64)
}

func timeText(t *time.Time) string {
	if t == nil {
		return "–"
	}
	return t.UTC().Format(time.RFC3339)
}
