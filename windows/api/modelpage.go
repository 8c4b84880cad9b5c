package api

import (
	"context"
	"errors"
	"html/template"
	"net/http"
	"net/url"
	"slices"
	"strconv"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api/chart"
	"github.com/classwatch/classwatch/windows/store"
)

// DefaultHistory is how far back a model page's history reaches from the
// watermark when Options leaves it zero.
const DefaultHistory = 30 * 24 * time.Hour

// maxReferenceRules caps the rule comparisons a model page draws.
const maxReferenceRules = 4

// modelContent is one model's page (README "Pages and the audit report").
const modelContent = `{{define "content"}}
<h1>{{.Model}}{{if .Segment}} <span class="muted">· segment {{.Segment}}</span>{{end}}</h1>
<p>watermark {{.Watermark}} · last prediction {{.LastPrediction}} · last label {{.LastLabel}} · bucket {{.Bucket}} · intervals: Wilson score at {{.Confidence}}</p>
<form class="seg" method="get" action="{{.Link}}"><label for="segment">segment</label>
<input id="segment" name="segment" value="{{.Segment}}" placeholder="all segments"><button type="submit">show</button>
{{if .Segment}}<a href="{{.Link}}">all segments</a>{{end}}</form>
<p class="note">Window figures without a segment come from the daemon's running sums; with a segment they are read from the store over the same bounds.
A <dfn>matured</dfn> window ends its lag before the <dfn>watermark</dfn> (the end of the bucket holding the latest prediction), so late labels have arrived for most of it.</p>
{{if .Alerts}}<h2>Alerts on this model</h2><ul class="alerts">
{{range .Alerts}}<li class="{{.State}}"><span><span class="tag {{.State}}">{{.State}}</span></span><span><b>{{.Rule}}</b> · {{.Subject}}{{if .Window}} · window {{.Window}}{{end}} · {{.Value}}{{if .Interval}} ({{.Interval}}){{end}} · since {{.Since}} ({{.SinceAgo}})</span></li>
{{end}}</ul>{{end}}
{{range .Windows}}
<section><h2>Window {{.Name}} <span class="note">[{{.From}}, {{.To}}){{if .Matured}} · matured, lag {{.Lag}}{{end}}</span></h2>
{{if .Error}}<p class="caution">{{.Error}}</p>{{else}}
<p>{{.F.Predictions}} predictions · {{.F.Labeled}} labeled (coverage {{ratio (index .F.Metrics.Values "label_coverage")}}) · accuracy {{ratio (index .F.Metrics.Values "accuracy")}} · balanced accuracy {{ratio (index .F.Metrics.Values "balanced_accuracy")}} · macro F1 {{ratio (index .F.Metrics.Values "macro_f1")}}
{{if .ReportLink}} · <a href="{{.ReportLink}}">audit report of this window</a> · <a href="{{.MatrixLink}}">matrix JSON</a>{{end}}</p>
<div class="grid">
<figure><figcaption>confusion matrix, counts</figcaption>{{.Counts}}</figure>
<figure><figcaption>share of each actual row (diagonal = recall)</figcaption>{{.Shares}}</figure>
<figure><figcaption>recall per class{{if .Threshold}} · dashed: an alert's threshold{{end}}</figcaption>{{.Recall}}</figure>
<figure><figcaption>precision per class</figcaption>{{.Precision}}</figure>
</div>{{end}}</section>
{{end}}
{{range .References}}
<section><h2>Rule {{.Rule}}: current and reference period</h2>
<p class="note">current [{{.From}}, {{.To}}) · reference [{{.RefFrom}}, {{.RefTo}}) (hollow rows)</p>
{{if .Error}}<p class="caution">{{.Error}}</p>{{else}}<div class="grid"><figure><figcaption>recall per class</figcaption>{{.Recall}}</figure><figure><figcaption>prevalence per class</figcaption>{{.Prevalence}}</figure></div>{{end}}
</section>
{{end}}
<section><h2>History</h2>
<p class="note">{{.HistoryNote}} Bands are the Wilson interval of each point; hatched stretches are reference periods of rules.</p>
{{if .HistoryError}}<p class="caution">{{.HistoryError}}</p>{{end}}
<table><thead><tr><th>class</th><th class="l">recall</th><th class="l">prevalence</th></tr></thead><tbody>
{{range .History}}<tr><td class="l">{{.Class}}</td><td class="l">{{.Recall}}</td><td class="l">{{.Prevalence}}</td></tr>
{{end}}</tbody></table></section>
{{end}}`

type modelPage struct {
	pageHead
	Model, Link, Segment      string
	Watermark, Bucket         string
	LastPrediction, LastLabel string
	Confidence                string
	Alerts                    []alertRow
	Windows                   []modelWindow
	References                []referencePanel
	History                   []classHistory
	HistoryNote, HistoryError string
	classes                   []string
	watermark                 time.Time
	segment                   *string
	spans                     map[string][]chart.Span
}

type modelWindow struct {
	Name, From, To, Lag    string
	Matured                bool
	Error                  string
	F                      Figures
	ReportLink, MatrixLink string
	Threshold              bool
	Counts, Shares         template.HTML
	Recall, Precision      template.HTML
}

type referencePanel struct {
	Rule, From, To, RefFrom, RefTo string
	Error                          string
	Recall, Prevalence             template.HTML
}

type classHistory struct {
	Class              string
	Recall, Prevalence template.HTML
}

// handleModelPage renders GET /models/{model}.
func (a *API) handleModelPage(w http.ResponseWriter, r *http.Request) {
	ctx := r.Context()
	model := r.PathValue("model")
	info, known, err := a.modelInfo(ctx, model)
	if err != nil {
		a.log.WarnContext(ctx, "model page: list models", "err", err)
		a.pageError(w, r, http.StatusServiceUnavailable, "Store unavailable", "The store did not answer; see the daemon's log.")
		return
	}
	if !known {
		a.pageError(w, r, http.StatusNotFound, "Unknown model", "No model named "+quote(model)+" has been configured or seen.")
		return
	}
	now := a.now().UTC()
	p := &modelPage{
		pageHead:   pageHead{Title: model, Generated: now.Format(time.RFC3339)},
		Model:      model,
		Link:       modelLink(model),
		Bucket:     windows.FormatDuration(a.tracker.Options(model).Bucket),
		Confidence: strconv.FormatFloat(100*a.confidence, 'g', -1, 64) + "%",
		classes:    info.Classes,
		spans:      map[string][]chart.Span{},
	}
	if q := r.URL.Query(); q.Has("segment") && q.Get("segment") != "" {
		seg := q.Get("segment")
		p.Segment, p.segment = seg, &seg
	}
	p.watermark, _ = a.tracker.Watermark(model)
	if p.watermark.IsZero() {
		p.watermark = windows.Watermark(info.LatestAt, a.tracker.Options(model).Bucket)
	}
	p.Watermark = timeText(optTime(p.watermark))
	p.LastPrediction = ago(now, info.LatestAt)
	if latest, err := a.labels.get(ctx, a.store, now); err == nil {
		p.LastLabel = ago(now, latest[model])
	}
	alerts, err := a.alertStates(ctx, func(rec store.AlertRecord) bool { return rec.Model == model })
	if err != nil {
		a.log.WarnContext(ctx, "model page: read alerts", "err", err)
	}
	for _, al := range alerts {
		if al.State == "firing" || al.State == "pending" {
			p.Alerts = append(p.Alerts, alertRow{alertView: al, Value: htmlNum(al.Result.Value), Interval: htmlIntervalOpt(al.Result.Interval),
				Since: al.Since().UTC().Format(time.RFC3339), SinceAgo: ago(now, al.Since())})
		}
	}
	p.References = a.references(ctx, p, alerts)
	p.Windows = a.modelWindows(ctx, p, alerts)
	a.modelHistory(ctx, p)
	a.render(w, r, a.pages.model, http.StatusOK, p)
}

// modelInfo finds model in the store, or in the tracker for a configured
// model without traffic yet.
func (a *API) modelInfo(ctx context.Context, model string) (store.ModelInfo, bool, error) {
	infos, err := a.store.Models(ctx)
	if err != nil {
		return store.ModelInfo{}, false, err
	}
	if i := slices.IndexFunc(infos, func(m store.ModelInfo) bool { return m.Name == model }); i >= 0 {
		return infos[i], true, nil
	}
	if _, ok := a.tracker.Watermark(model); ok {
		info := store.ModelInfo{Name: model}
		if views := a.tracker.Views(model); len(views) > 0 {
			info.Classes = views[0].Matrix.Classes()
		}
		return info, true, nil
	}
	return store.ModelInfo{}, false, nil
}

func (a *API) modelWindows(ctx context.Context, p *modelPage, alerts []alertView) []modelWindow {
	var out []modelWindow
	for _, v := range a.tracker.Views(p.Model) {
		b := bounds(v.Window, v.Watermark)
		mw := modelWindow{Name: v.Window.Name, From: timeText(b.From), To: timeText(b.To), Lag: b.Lag, Matured: v.Window.Lag > 0}
		if p.segment == nil {
			mw.F = FiguresOf(v.Matrix, v.Metrics(a.confidence), a.confidence)
		} else if b.From != nil {
			q := MatrixQuery{Model: p.Model, From: *b.From, To: *b.To, Bucket: a.tracker.Options(p.Model).Bucket, Segment: p.segment}
			rep, err := MatrixReport(ctx, a.store, q, a.now(), a.confidence)
			if err != nil {
				a.log.WarnContext(ctx, "model page: read segment", "err", err)
				mw.Error = "The store could not be read for this segment; see the daemon's log."
				out = append(out, mw)
				continue
			}
			mw.F = rep.Figures
		} else {
			mw.F = NewFigures(windows.NewMatrix(p.classes), make([]int64, len(p.classes)), a.confidence)
		}
		if b.From != nil {
			q := url.Values{"from": {b.From.Format(time.RFC3339)}, "to": {b.To.Format(time.RFC3339)}}
			if p.segment != nil {
				q.Set("segment", *p.segment)
			}
			esc := url.PathEscape(p.Model)
			mw.ReportLink = "/v1/models/" + esc + "/report?" + q.Encode()
			mw.MatrixLink = "/v1/models/" + esc + "/matrix?" + q.Encode()
		}
		var threshold *float64
		alerting := map[string]bool{}
		for _, al := range alerts {
			if al.Window == v.Window.Name && (al.State == "firing" || al.State == "pending") {
				alerting[al.Class] = true
			}
			if al.Window == v.Window.Name && al.Metric == "recall" && al.Result.Threshold != nil {
				threshold = al.Result.Threshold
			}
		}
		mw.Threshold = threshold != nil
		label := p.Model + " window " + v.Window.Name
		mw.Counts = chart.DrawHeatmap(chart.Heatmap{Classes: mw.F.Classes, Matrix: mw.F.Matrix, Label: label + " confusion counts"})
		mw.Shares = chart.DrawHeatmap(chart.Heatmap{Classes: mw.F.Classes, Matrix: mw.F.Matrix, Mode: chart.RowShare, Label: label + " row shares"})
		mw.Recall = chart.DrawIntervals(classIntervals(mw.F, label+" recall", alerting, threshold, true))
		mw.Precision = chart.DrawIntervals(classIntervals(mw.F, label+" precision", alerting, nil, false))
		out = append(out, mw)
	}
	return out
}

// classIntervals lists f's per-class recall (or precision) rows.
func classIntervals(f Figures, label string, alerting map[string]bool, threshold *float64, recall bool) chart.Intervals {
	iv := chart.Intervals{Label: label, Threshold: threshold}
	for _, c := range f.Classes {
		cf := f.Metrics.PerClass[c]
		row := chart.IntervalRow{Label: c, Alert: alerting[c]}
		if recall {
			row.Value, row.Interval, row.Note = cf.Values["recall"], cf.Intervals["recall"], "n="+strconv.FormatInt(cf.Support, 10)
		} else {
			row.Value, row.Interval, row.Note = cf.Values["precision"], cf.Intervals["precision"], "n="+strconv.FormatInt(cf.Predictions, 10)
		}
		iv.Rows = append(iv.Rows, row)
	}
	return iv
}

func htmlIntervalOpt(iv *[2]float64) string {
	if iv == nil {
		return ""
	}
	return htmlInterval(iv)
}

// references draws, for each rule of the model that names a reference
// period, the current and the reference figures side by side, and notes
// the reference spans for the history charts.
func (a *API) references(ctx context.Context, p *modelPage, alerts []alertView) []referencePanel {
	seen := map[string]bool{}
	var out []referencePanel
	for _, al := range alerts {
		ref := al.Result.Reference
		if ref == nil || seen[al.Rule] || len(out) == maxReferenceRules || al.Result.From.IsZero() {
			continue
		}
		seen[al.Rule] = true
		span := chart.Span{From: ref.From, To: ref.To, Label: "reference period of rule " + al.Rule}
		p.spans[al.Class] = append(p.spans[al.Class], span)
		rp := referencePanel{Rule: al.Rule, From: rfc(al.Result.From), To: rfc(al.Result.To), RefFrom: rfc(ref.From), RefTo: rfc(ref.To)}
		cur, err1 := a.PeriodFigures(ctx, p, al.Result.From, al.Result.To)
		old, err2 := a.PeriodFigures(ctx, p, ref.From, ref.To)
		if err := errors.Join(err1, err2); err != nil {
			a.log.WarnContext(ctx, "model page: read reference period", "rule", al.Rule, "err", err)
			rp.Error = "The periods could not be read; see the daemon's log."
			out = append(out, rp)
			continue
		}
		rec, prev := chart.Intervals{Label: "recall, current and reference"}, chart.Intervals{Label: "prevalence, current and reference"}
		for _, c := range cur.Classes {
			cc, oc := cur.Metrics.PerClass[c], old.Metrics.PerClass[c]
			rec.Rows = append(rec.Rows,
				chart.IntervalRow{Label: c, Value: cc.Values["recall"], Interval: cc.Intervals["recall"], Note: "n=" + strconv.FormatInt(cc.Support, 10), Alert: al.Class == c && al.State == "firing"},
				chart.IntervalRow{Label: "reference", Value: oc.Values["recall"], Interval: oc.Intervals["recall"], Note: "n=" + strconv.FormatInt(oc.Support, 10), Reference: true})
			prev.Rows = append(prev.Rows,
				chart.IntervalRow{Label: c, Value: cc.Values["prevalence"]},
				chart.IntervalRow{Label: "reference", Value: oc.Values["prevalence"], Reference: true})
		}
		rp.Recall, rp.Prevalence = chart.DrawIntervals(rec), chart.DrawIntervals(prev)
		out = append(out, rp)
	}
	return out
}

func rfc(t time.Time) string { return t.UTC().Format(time.RFC3339) }

// PeriodFigures reads the model's figures over [from, to) in the page's
// segment.
func (a *API) PeriodFigures(ctx context.Context, p *modelPage, from, to time.Time) (Figures, error) {
	q := MatrixQuery{Model: p.Model, From: from, To: to, Bucket: a.tracker.Options(p.Model).Bucket, Segment: p.segment}
	rep, err := MatrixReport(ctx, a.store, q, a.now(), a.confidence)
	return rep.Figures, err
}
