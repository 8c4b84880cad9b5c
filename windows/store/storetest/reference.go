package storetest

import (
	"cmp"
	"maps"
	"slices"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// reference is the suite's oracle: a deliberately naive in-memory model of
// the join semantics written from store.Store's documentation. It keeps
// every prediction with its full label history and recomputes each figure
// from scratch, so it shares no shortcut with a backend (no maintained
// cells, no copy of the current label). It does not model PurgeRaw, whose
// tests use explicit values instead.
type reference struct {
	preds map[refKey]*refPrediction
	early map[refKey][]refEarly
}

type refKey struct{ model, id string }

type refPrediction struct {
	p        store.Prediction
	versions []refVersion
}

type refVersion struct {
	actual  string
	at      time.Time
	implied bool
}

type refEarly struct {
	actual   string
	at       time.Time
	received time.Time
}

func newReference() *reference {
	return &reference{preds: map[refKey]*refPrediction{}, early: map[refKey][]refEarly{}}
}

// current returns the prediction's label: its real version with the
// greatest (at, actual), else its implied version.
func (r *refPrediction) current() (refVersion, bool) {
	return r.known(time.Time{}, false)
}

// asOf returns the label known at t: the latest real version with at ≤ t,
// else the implied version when its at ≤ t.
func (r *refPrediction) asOf(t time.Time) (refVersion, bool) {
	return r.known(t, true)
}

func (r *refPrediction) known(t time.Time, bounded bool) (refVersion, bool) {
	var best, implied refVersion
	var haveBest, haveImplied bool
	for _, v := range r.versions {
		if bounded && v.at.After(t) {
			continue
		}
		if v.implied {
			implied, haveImplied = v, true
			continue
		}
		if !haveBest || v.at.After(best.at) || (v.at.Equal(best.at) && v.actual > best.actual) {
			best, haveBest = v, true
		}
	}
	if haveBest {
		return best, true
	}
	return implied, haveImplied
}

func (r *reference) predictions(batch []store.Prediction) []store.PredictionOutcome {
	out := make([]store.PredictionOutcome, len(batch))
	for i, p := range batch {
		k := refKey{p.Model, p.ID}
		if old, ok := r.preds[k]; ok {
			same := old.p.Predicted == p.Predicted && old.p.Segment == p.Segment &&
				maps.Equal(old.p.Scores, p.Scores) && (p.AtDefaulted || old.p.At.Equal(p.At))
			out[i] = store.PredictionConflict
			if same {
				out[i] = store.PredictionDuplicate
			}
			continue
		}
		rp := &refPrediction{p: p}
		for _, e := range r.early[k] {
			rp.versions = append(rp.versions, refVersion{actual: e.actual, at: e.at})
		}
		delete(r.early, k)
		r.preds[k] = rp
		out[i] = store.PredictionStored
	}
	return out
}

func (r *reference) labels(batch []store.Label, now time.Time) []store.LabelOutcome {
	out := make([]store.LabelOutcome, len(batch))
	for i, l := range batch {
		k := refKey{l.Model, l.ID}
		rp, ok := r.preds[k]
		if !ok {
			held := slices.ContainsFunc(r.early[k], func(e refEarly) bool { return e.actual == l.Actual && e.at.Equal(l.At) })
			if held {
				out[i] = store.LabelDuplicate
				continue
			}
			r.early[k] = append(r.early[k], refEarly{actual: l.Actual, at: l.At, received: now})
			out[i] = store.LabelEarly
			continue
		}
		v := refVersion{actual: l.Actual, at: l.At}
		if slices.ContainsFunc(rp.versions, func(x refVersion) bool { return !x.implied && x.actual == v.actual && x.at.Equal(v.at) }) {
			out[i] = store.LabelDuplicate
			continue
		}
		before, had := rp.current()
		rp.versions = append(rp.versions, v)
		after, _ := rp.current()
		switch {
		case !had:
			out[i] = store.LabelMatched
		case before.actual != after.actual:
			out[i] = store.LabelCorrected
		default:
			out[i] = store.LabelDuplicate
		}
	}
	return out
}

func (r *reference) applyTimeout(model, label string, timeout time.Duration, now time.Time) int64 {
	var n int64
	for k, rp := range r.preds {
		if k.model != model || len(rp.versions) > 0 || rp.p.At.Add(timeout).After(now) {
			continue
		}
		rp.versions = append(rp.versions, refVersion{actual: label, at: rp.p.At.Add(timeout), implied: true})
		n++
	}
	return n
}

func (r *reference) expire(model string, ttl time.Duration, now time.Time) int64 {
	var n int64
	limit := now.Add(-ttl)
	for k, es := range r.early {
		if k.model != model {
			continue
		}
		kept := es[:0]
		for _, e := range es {
			if e.received.After(limit) {
				kept = append(kept, e)
			} else {
				n++
			}
		}
		if len(kept) == 0 {
			delete(r.early, k)
		} else {
			r.early[k] = kept
		}
	}
	return n
}

// counts computes q's figures; with asOf non-nil, as known at *asOf
// (predictions made after it are left out).
func (r *reference) counts(q store.Query, asOf *time.Time) store.Counts {
	type ck struct {
		bucket            int64
		actual, predicted string
	}
	type pk struct {
		bucket    int64
		predicted string
	}
	cells, pred := map[ck]int64{}, map[pk]int64{}
	scores := store.NewScoreRecount()
	for k, rp := range r.preds {
		p := rp.p
		if k.model != q.Model || p.Bucket.Before(q.From) || !p.Bucket.Before(q.To) {
			continue
		}
		if q.Segment != nil && p.Segment != *q.Segment {
			continue
		}
		if asOf != nil && p.At.After(*asOf) {
			continue
		}
		pred[pk{p.Bucket.UnixMicro(), p.Predicted}]++
		var v refVersion
		var ok bool
		if asOf != nil {
			v, ok = rp.asOf(*asOf)
		} else {
			v, ok = rp.current()
		}
		if ok {
			cells[ck{p.Bucket.UnixMicro(), v.actual, p.Predicted}]++
		}
		scores.Add("", p.Bucket, p.Predicted, p.Scores, v.actual, ok)
	}
	var out store.Counts
	out.Scores, out.Calibration, out.Brier = scores.Counts("", classesOf(q.Model))
	for k, n := range cells {
		out.Cells = append(out.Cells, store.Cell{Bucket: time.UnixMicro(k.bucket).UTC(), Actual: k.actual, Predicted: k.predicted, N: n})
	}
	for k, n := range pred {
		out.Predicted = append(out.Predicted, store.PredictedCount{Bucket: time.UnixMicro(k.bucket).UTC(), Predicted: k.predicted, N: n})
	}
	slices.SortFunc(out.Cells, func(a, b store.Cell) int {
		return cmp.Or(a.Bucket.Compare(b.Bucket), cmp.Compare(a.Actual, b.Actual), cmp.Compare(a.Predicted, b.Predicted))
	})
	slices.SortFunc(out.Predicted, func(a, b store.PredictedCount) int {
		return cmp.Or(a.Bucket.Compare(b.Bucket), cmp.Compare(a.Predicted, b.Predicted))
	})
	return out
}

// totals returns what Models reports for model: stored predictions, those
// with a current label, and the latest prediction time.
func (r *reference) totals(model string) (preds, labeled int64, latest time.Time) {
	for k, rp := range r.preds {
		if k.model != model {
			continue
		}
		preds++
		if _, ok := rp.current(); ok {
			labeled++
		}
		if rp.p.At.After(latest) {
			latest = rp.p.At
		}
	}
	return preds, labeled, latest
}

// tally is every model's counts over all time, keyed for diffing: the
// expected Changes of a call are tally after minus tally before.
type tally struct {
	cells map[changeCell]int64
	pred  map[changePred]int64
}

type changeCell struct {
	model             string
	bucket            int64
	actual, predicted string
}

type changePred struct {
	model     string
	bucket    int64
	predicted string
}

func (r *reference) tally() tally {
	t := tally{cells: map[changeCell]int64{}, pred: map[changePred]int64{}}
	for k, rp := range r.preds {
		b := rp.p.Bucket.UnixMicro()
		t.pred[changePred{k.model, b, rp.p.Predicted}]++
		if v, ok := rp.current(); ok {
			t.cells[changeCell{k.model, b, v.actual, rp.p.Predicted}]++
		}
	}
	return t
}

// diff returns after − before without zero entries.
func (after tally) diff(before tally) tally {
	d := tally{cells: map[changeCell]int64{}, pred: map[changePred]int64{}}
	for k, n := range after.cells {
		d.cells[k] += n
	}
	for k, n := range before.cells {
		d.cells[k] -= n
	}
	for k, n := range after.pred {
		d.pred[k] += n
	}
	for k, n := range before.pred {
		d.pred[k] -= n
	}
	maps.DeleteFunc(d.cells, func(_ changeCell, n int64) bool { return n == 0 })
	maps.DeleteFunc(d.pred, func(_ changePred, n int64) bool { return n == 0 })
	return d
}
