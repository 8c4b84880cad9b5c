package alerts

import (
	"cmp"
	"context"
	"fmt"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// cusumHorizon is how far before the latest matured bucket the statistic
// starts from 0. Starting later than the first bucket ever can only lower
// the statistic, so the false-alarm promise holds; a week holds many
// times the trials a real shift needs to reach the threshold.
const cusumHorizon = 7 * 24 * time.Hour

// Directions of a cusum rule.
const (
	DirectionDown = "down"
	DirectionUp   = "up"
)

var cusumKeys = []string{"metric", "classes", "direction", "lag", "reference", "expected", "shift", "false_alarm_every"}

func cusumDefaults(r *Rule) {
	r.Metric = cmp.Or(r.Metric, "recall")
	r.Direction = cmp.Or(r.Direction, DirectionDown)
}

// cusumEval evaluates a cusum rule: per class, a Bernoulli CUSUM over the
// matured buckets, recomputed from the stored cells at each evaluation.
type cusumEval struct{ r *Rule }

func newCUSUM(r *Rule, bad badFunc) Evaluator {
	switch r.Metric {
	case "recall", "precision", "specificity", "prevalence":
	default:
		bad("metric", "%q: a cusum rule watches recall, precision, specificity or prevalence", r.Metric)
	}
	if r.Direction != DirectionDown && r.Direction != DirectionUp {
		bad("direction", "%q is not one of down, up", r.Direction)
	}
	if r.Lag < 0 {
		bad("lag", "must not be negative")
	}
	switch {
	case r.Shift == 0:
		bad("shift", "required: the change to catch fast, strictly between 0 and 1")
	case !(r.Shift > 0 && r.Shift < 1):
		bad("shift", "%g must lie strictly between 0 and 1", r.Shift)
	}
	if r.FalseAlarmEvery <= 0 {
		bad("false_alarm_every", "required and positive")
	}
	hasRef := r.Reference != (Reference{})
	switch {
	case hasRef && r.Expected != 0:
		bad("expected", "give either reference or expected, not both")
	case hasRef:
		checkReference(r, bad)
	case r.Expected == 0:
		bad("expected", "required unless reference is given: the in-control proportion")
	case !(r.Expected > 0 && r.Expected < 1):
		bad("expected", "%g must lie strictly between 0 and 1", r.Expected)
	default:
		if p1 := shifted(r, r.Expected); !(p1 > 0 && p1 < 1) {
			bad("shift", "expected %g shifted %s by %g leaves (0, 1)", r.Expected, r.Direction, r.Shift)
		}
	}
	return &cusumEval{r: r}
}

// checkCUSUMReference reports a reference window that lies wholly within
// the buckets the chart reads itself ([W − lag − 7d, W − lag)): p0 would
// never have data. Several windows of one name (per-model windows) pass
// when one of them reaches outside.
func checkCUSUMReference(r *Rule, ws []windows.Window) error {
	if r.Reference.Window == "" {
		return nil
	}
	inside := false
	for _, w := range ws {
		if w.Name != r.Reference.Window {
			continue
		}
		if w.Lag < r.Lag || w.Lag+w.Length > r.Lag+cusumHorizon {
			return nil
		}
		inside = true
	}
	if inside {
		return fmt.Errorf("reference: window %s lies within the buckets the cusum reads itself (from lag %s back %s), so p0 would have no data; use a longer or older window",
			r.Reference.Window, r.Lag, cusumHorizon)
	}
	return nil
}

// shifted returns p1 for the in-control proportion p0.
func shifted(r *Rule, p0 float64) float64 {
	if r.Direction == DirectionUp {
		return p0 + r.Shift
	}
	return p0 - r.Shift
}

// Evaluate runs the CUSUM of each of the rule's classes.
func (e *cusumEval) Evaluate(ctx context.Context, in Input) ([]Finding, error) {
	r := e.r
	wm, ok := in.Source.Watermark(in.Model.Name)
	if !ok {
		return nil, fmt.Errorf("watermark: %w", ErrNoWindow)
	}
	end := wm.Add(-r.Lag)
	start := end.Add(-cusumHorizon)
	counts, err := in.Source.Counts(ctx, store.Query{Model: in.Model.Name, From: start, To: end})
	if err != nil {
		return nil, fmt.Errorf("read matured buckets: %w", err)
	}
	classes := in.Model.Classes
	idx, err := classIndexes(r, in.Model.Name, classes)
	if err != nil {
		return nil, err
	}
	seqs, err := bucketTrials(r.Metric, classes, counts.Cells)
	if err != nil {
		return nil, err
	}
	var ref []proportion
	var refFrom, refTo time.Time
	if r.Expected == 0 {
		if ref, refFrom, refTo, err = e.reference(ctx, in, counts.Cells, start, end); err != nil {
			return nil, fmt.Errorf("read reference %s: %w", r.Reference, err)
		}
	}
	out := make([]Finding, 0, len(idx))
	for _, k := range idx {
		res := Result{From: start, To: end, Confidence: in.Confidence}
		p0 := r.Expected
		if ref != nil {
			res.Reference = &Figures{From: refFrom, To: refTo, Count: ref[k].n}
			if ref[k].n < r.MinCount {
				res = unknown(res, "n=%d in the reference outside the chart's own buckets; min_count is %d", ref[k].n, r.MinCount)
				out = append(out, Finding{Model: in.Model.Name, Class: classes[k], Result: res})
				continue
			}
			// A reference without a single failure (or success) is read
			// as having half of one, so that both weights stay finite.
			half := 0.5 / float64(ref[k].n)
			p0 = min(max(ref[k].value(), half), 1-half)
			res.Reference.Value = ptr(ref[k].value())
		}
		res = e.judge(res, seqs[k], p0, end.Sub(start))
		out = append(out, Finding{Model: in.Model.Name, Class: classes[k], Result: res})
	}
	return out, nil
}

// judge designs the chart for p0 at the observed trial rate over span and
// runs it over seq.
func (e *cusumEval) judge(res Result, seq []Trials, p0 float64, span time.Duration) Result {
	r := e.r
	var n, x int64
	for _, t := range seq {
		n, x = n+t.N, x+t.X
	}
	res.Count, res.Expected = n, ptr(p0)
	if n == 0 {
		return unknown(res, "no matured trials in the last %s", cusumHorizon)
	}
	res.Value = ptr(float64(x) / float64(n))
	p1 := shifted(r, p0)
	if !(p1 > 0 && p1 < 1) {
		return unknown(res, "in-control %.4g shifted %s by %g leaves (0, 1)", p0, r.Direction, r.Shift)
	}
	res.Alternative = ptr(p1)
	// The observed trial rate: trials over the span since the first
	// bucket that had any.
	if first := seq[0].Bucket; span > res.To.Sub(first) {
		span = res.To.Sub(first)
	}
	perHour := float64(n) / span.Hours()
	res.TrialsPerHour = ptr(perHour)
	c, err := DesignCUSUM(p0, p1, max(1, perHour*r.FalseAlarmEvery.Hours()))
	if err != nil {
		return unknown(res, "%v", err)
	}
	s, since, err := c.Run(seq)
	if err != nil {
		return unknown(res, "%v", err)
	}
	res.Statistic, res.Threshold = ptr(float64(s)*c.Unit), ptr(c.Threshold())
	if !since.IsZero() {
		res.RunStart = ptr(since)
	}
	switch {
	case s >= c.H:
		res.Outcome = OutcomeMet
	case s == 0:
		res.Outcome = OutcomeClear
	default:
		res.Outcome = OutcomeHold
	}
	return res
}

// reference returns the in-control trials of every class from the
// reference period, leaving out the buckets of [start, end) the chart
// itself reads, so that p0 and the statistic rest on separate data.
func (e *cusumEval) reference(ctx context.Context, in Input, cells []store.Cell, start, end time.Time) ([]proportion, time.Time, time.Time, error) {
	r, classes := e.r, in.Model.Classes
	ref := r.Reference
	if ref.Window == "" {
		tally := make([]proportion, len(classes))
		for _, pc := range [][2]time.Time{{ref.From, minTime(ref.To, start)}, {maxTime(ref.From, end), ref.To}} {
			if !pc[0].Before(pc[1]) {
				continue
			}
			c, err := in.Source.Counts(ctx, store.Query{Model: in.Model.Name, From: pc[0], To: pc[1]})
			if err != nil {
				return nil, time.Time{}, time.Time{}, err
			}
			if err := addCells(tally, r.Metric, classes, c.Cells, 1); err != nil {
				return nil, time.Time{}, time.Time{}, err
			}
		}
		return tally, ref.From, ref.To, nil
	}
	v, err := view(in, ref.Window)
	if err != nil {
		return nil, time.Time{}, time.Time{}, err
	}
	tally := make([]proportion, len(classes))
	mc := v.Matrix.Classes()
	var window []store.Cell
	for a := range mc {
		for p := range mc {
			if n := v.Matrix.At(a, p); n != 0 {
				window = append(window, store.Cell{Actual: mc[a], Predicted: mc[p], N: n})
			}
		}
	}
	if err := addCells(tally, r.Metric, classes, window, 1); err != nil {
		return nil, time.Time{}, time.Time{}, err
	}
	var shared []store.Cell
	for _, c := range cells {
		if !c.Bucket.Before(v.From) && c.Bucket.Before(v.To) {
			shared = append(shared, c)
		}
	}
	return tally, v.From, v.To, addCells(tally, r.Metric, classes, shared, -1)
}

// bucketTrials turns cells ordered by bucket into each class's sequence of
// per-bucket trials (buckets without a trial of the class left out).
func bucketTrials(metric string, classes []string, cells []store.Cell) ([][]Trials, error) {
	seqs := make([][]Trials, len(classes))
	tally := make([]proportion, len(classes))
	flush := func(b time.Time) {
		for k, t := range tally {
			if t.n > 0 {
				seqs[k] = append(seqs[k], Trials{Bucket: b, N: t.n, X: t.x})
			}
			tally[k] = proportion{}
		}
	}
	for i, c := range cells {
		if i > 0 && !c.Bucket.Equal(cells[i-1].Bucket) {
			flush(cells[i-1].Bucket)
		}
		if err := addCells(tally, metric, classes, cells[i:i+1], 1); err != nil {
			return nil, err
		}
	}
	if len(cells) > 0 {
		flush(cells[len(cells)-1].Bucket)
	}
	return seqs, nil
}

// addCells adds sign × each cell's count to every class's trials and
// successes of the metric (README.md "Metric definitions": recall of k
// counts actual k, precision predicted k, specificity actual not k, and
// prevalence every labeled example, with successes TP, TP, TN and actual
// k).
func addCells(tally []proportion, metric string, classes []string, cells []store.Cell, sign int64) error {
	for _, c := range cells {
		a, p := slices.Index(classes, c.Actual), slices.Index(classes, c.Predicted)
		if a < 0 || p < 0 {
			return fmt.Errorf("cell %s→%s names a class the model lacks", c.Actual, c.Predicted)
		}
		for k := range tally {
			var trial, success bool
			switch metric {
			case "recall":
				trial, success = a == k, a == k && p == k
			case "precision":
				trial, success = p == k, a == k && p == k
			case "specificity":
				trial, success = a != k, a != k && p != k
			case "prevalence":
				trial, success = true, a == k
			}
			if trial {
				tally[k].n += sign * c.N
			}
			if success {
				tally[k].x += sign * c.N
			}
		}
	}
	return nil
}

func describeCUSUM(a *Alert, subject string) string {
	res := a.Result
	return fmt.Sprintf("cusum of %s of %s on matured buckets: %s of threshold %s (in-control %s, watching for %s; %s over %d trials)",
		a.Metric, subject, num(res.Statistic), num(res.Threshold), num(res.Expected), num(res.Alternative), num(res.Value), res.Count)
}
