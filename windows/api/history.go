package api

import (
	"context"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api/chart"
	"github.com/classwatch/classwatch/windows/stats"
	"github.com/classwatch/classwatch/windows/store"
)

// PeriodFigures are the figures of one step of a history: a day of an
// audit report, or a day or window length on a model page.
type PeriodFigures struct {
	From        time.Time              `json:"from"`
	To          time.Time              `json:"to"`
	Predictions int64                  `json:"predictions"`
	Labeled     int64                  `json:"labeled"`
	PerClass    map[string]PeriodClass `json:"per_class"`
}

// PeriodClass is one class's figures in one step; nil is undefined.
type PeriodClass struct {
	Support            int64       `json:"support"`
	Recall             *float64    `json:"recall"`
	RecallInterval     *[2]float64 `json:"recall_interval"`
	Prevalence         *float64    `json:"prevalence"`
	PrevalenceInterval *[2]float64 `json:"prevalence_interval"`
}

// history splits counts into steps of width step from from to to (the
// last step may be shorter) and computes each step's figures over classes.
// Counts of a class not in classes are skipped: the caller passes every
// class the counts name.
func history(classes []string, counts store.Counts, from, to time.Time, step time.Duration, confidence float64) []PeriodFigures {
	if step <= 0 || !to.After(from) {
		return nil
	}
	n := int((to.Sub(from) + step - 1) / step)
	mats := make([]*windows.Matrix, n)
	preds := make([][]int64, n)
	for i := range mats {
		mats[i] = windows.NewMatrix(classes)
		preds[i] = make([]int64, len(classes))
	}
	index := func(t time.Time) int {
		if t.Before(from) || !t.Before(to) {
			return -1
		}
		return int(t.Sub(from) / step)
	}
	for _, c := range counts.Cells {
		if i := index(c.Bucket); i >= 0 {
			_ = mats[i].AddNamed(c.Actual, c.Predicted, c.N) // unknown classes skipped, see above
		}
	}
	for _, p := range counts.Predicted {
		if i := index(p.Bucket); i >= 0 {
			if k, ok := mats[i].Index(p.Predicted); ok {
				preds[i][k] += p.N
			}
		}
	}
	out := make([]PeriodFigures, n)
	for i := range out {
		pf := PeriodFigures{From: from.Add(time.Duration(i) * step), PerClass: make(map[string]PeriodClass, len(classes))}
		pf.To = minTime(pf.From.Add(step), to)
		mt := windows.Compute(mats[i], preds[i], confidence)
		pf.Predictions, pf.Labeled = mt.Predictions, mt.Labeled
		for _, cm := range mt.PerClass {
			pc := PeriodClass{Support: cm.Support, Recall: cm.Recall, RecallInterval: pair(cm.RecallInterval), Prevalence: cm.Prevalence}
			if lo, hi, ok := stats.Wilson(cm.Support, mt.Labeled, confidence); ok {
				pc.PrevalenceInterval = &[2]float64{lo, hi}
			}
			pf.PerClass[cm.Class] = pc
		}
		out[i] = pf
	}
	return out
}

// historyStep picks the width of a model page's history points, widest
// first: one point per day when the data spans at least minHistoryPoints
// days, else per hour, else per bucket.
func historyStep(span, bucket time.Duration) time.Duration {
	const minHistoryPoints = 3
	for _, step := range []time.Duration{24 * time.Hour, time.Hour} {
		if step >= bucket && span >= minHistoryPoints*step {
			return step
		}
	}
	return bucket
}

// modelHistory reads the page's history from the store: from the first
// bucket with data within DefaultHistory (or Options.History) before the
// watermark up to the watermark.
func (a *API) modelHistory(ctx context.Context, p *modelPage) {
	if p.watermark.IsZero() {
		p.HistoryNote = "No prediction yet."
		return
	}
	bucket := a.tracker.Options(p.Model).Bucket
	to := p.watermark
	from := windows.BucketStart(to.Add(-a.history), bucket)
	counts, err := a.store.Counts(ctx, store.Query{Model: p.Model, From: from, To: to, Segment: p.segment})
	if err != nil {
		a.log.WarnContext(ctx, "model page: read history", "err", err)
		p.HistoryError = "The history could not be read; see the daemon's log."
		return
	}
	first := to
	classes := slices.Clone(p.classes)
	for _, c := range counts.Cells {
		first = minTime(first, c.Bucket)
		classes = appendNew(classes, c.Actual, c.Predicted)
	}
	for _, c := range counts.Predicted {
		first = minTime(first, c.Bucket)
		classes = appendNew(classes, c.Predicted)
	}
	if !first.Before(to) {
		p.HistoryNote = "No prediction in the " + windows.FormatDuration(a.history) + " before the watermark."
		return
	}
	step := historyStep(to.Sub(first), bucket)
	start := windows.BucketStart(first, step)
	hist := history(classes, counts, start, to, step, a.confidence)
	p.HistoryNote = "One point per " + windows.FormatDuration(step) + " from " + rfc(start) + " to the watermark, as labels are known now."
	for _, c := range classes {
		var rec, prev []chart.Point
		for _, h := range hist {
			pc := h.PerClass[c]
			rec = append(rec, chart.Point{At: h.From, Value: pc.Recall, Interval: pc.RecallInterval})
			prev = append(prev, chart.Point{At: h.From, Value: pc.Prevalence, Interval: pc.PrevalenceInterval})
		}
		p.History = append(p.History, classHistory{
			Class:      c,
			Recall:     chart.DrawTrend(chart.Trend{Label: c + " recall", Points: rec, Max: 1, Spans: p.spans[c], Width: 360}),
			Prevalence: chart.DrawTrend(chart.Trend{Label: c + " prevalence", Points: prev, Spans: p.spans[c], Width: 360}),
		})
	}
}

func minTime(a, b time.Time) time.Time {
	if b.Before(a) {
		return b
	}
	return a
}
