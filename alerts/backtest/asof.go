package backtest

import (
	"context"
	"encoding/json"
	"fmt"
	"slices"
	"time"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/windows/store"
)

// count is one non-zero count of a bucket: cell (actual, predicted) by
// class index, or the predicted count of predicted when actual is
// predictedOnly.
type count struct {
	actual, predicted int32
	n                 int64
}

const predictedOnly = -1

// asOf is one model's store as it was at the replay clock: what the alert
// evaluators read through alerts.Store, answered from the events applied so
// far. It keeps per-bucket counts from the replay's first bucket on (memory
// grows with buckets and classes, not with events) and records the state
// changes the evaluators save instead of storing them.
type asOf struct {
	info    store.ModelInfo
	index   map[string]int32
	bucket  time.Duration
	first   time.Time // the oldest bucket held
	buckets map[int64][]count
	scores  map[int64]*scoreAgg
	// changes are the alert records saved with history, in order.
	changes []store.AlertRecord
}

func newAsOf(info store.ModelInfo, bucket time.Duration, first time.Time) *asOf {
	a := &asOf{info: info, index: make(map[string]int32, len(info.Classes)), bucket: bucket, first: first, buckets: map[int64][]count{}, scores: map[int64]*scoreAgg{}}
	a.info.LatestAt, a.info.Predictions, a.info.Labeled = time.Time{}, 0, 0
	for i, c := range info.Classes {
		a.index[c] = int32(i)
	}
	return a
}

// class returns the index of class name, registering a class the model
// did not list when the replay began.
func (a *asOf) class(name string) int32 {
	i, ok := a.index[name]
	if !ok {
		i = int32(len(a.info.Classes))
		a.info.Classes = append(a.info.Classes, name)
		a.index[name] = i
	}
	return i
}

// apply adds one event's effect on the counts and totals.
func (a *asOf) apply(e *store.Event) {
	b := e.Bucket.UnixNano()
	p := a.class(e.Predicted)
	a.applyScores(e)
	if e.Kind == store.EventPrediction {
		a.add(b, predictedOnly, p, e.Count)
		a.info.Predictions += e.Count
		if e.PredictionAt.After(a.info.LatestAt) {
			a.info.LatestAt = e.PredictionAt
		}
		return
	}
	if e.Old == "" {
		a.info.Labeled++
	} else {
		a.add(b, a.class(e.Old), p, -1)
	}
	a.add(b, a.class(e.Actual), p, 1)
}

func (a *asOf) add(b int64, actual, predicted int32, n int64) {
	cs := a.buckets[b]
	i, found := slices.BinarySearchFunc(cs, count{actual: actual, predicted: predicted}, compareCounts)
	switch {
	case !found:
		cs = slices.Insert(cs, i, count{actual, predicted, n})
	case cs[i].n+n == 0:
		cs = slices.Delete(cs, i, i+1)
	default:
		cs[i].n += n
	}
	if len(cs) == 0 {
		delete(a.buckets, b)
		return
	}
	a.buckets[b] = cs
}

func compareCounts(x, y count) int {
	if x.actual != y.actual {
		return int(x.actual - y.actual)
	}
	return int(x.predicted - y.predicted)
}

// Models returns the model as known at the replay clock.
func (a *asOf) Models(context.Context) ([]store.ModelInfo, error) {
	info := a.info
	info.Classes = slices.Clone(a.info.Classes)
	return []store.ModelInfo{info}, nil
}

// Counts sums the held buckets of q, as the store would have answered at
// the replay clock.
func (a *asOf) Counts(_ context.Context, q store.Query) (store.Counts, error) {
	if q.Model != a.info.Name {
		return store.Counts{}, fmt.Errorf("model %q: %w", q.Model, store.ErrUnknownModel)
	}
	if q.Segment != nil {
		return store.Counts{}, fmt.Errorf("read counts of segment %q: the backtest keeps no segments", *q.Segment)
	}
	if q.From.Before(a.first) {
		return store.Counts{}, fmt.Errorf("read counts from %s: the backtest holds buckets from %s on", q.From.Format(time.RFC3339), a.first.Format(time.RFC3339))
	}
	var out store.Counts
	step := int64(a.bucket)
	from, to := q.From.UnixNano(), q.To.UnixNano()
	if r := from % step; r != 0 {
		from += step - r
	}
	for b := from; b < to; b += step {
		cs, ok := a.buckets[b]
		if !ok {
			continue
		}
		at := time.Unix(0, b).UTC()
		for _, c := range cs {
			if c.actual == predictedOnly {
				out.Predicted = append(out.Predicted, store.PredictedCount{Bucket: at, Predicted: a.info.Classes[c.predicted], N: c.n})
			} else {
				out.Cells = append(out.Cells, store.Cell{Bucket: at, Actual: a.info.Classes[c.actual], Predicted: a.info.Classes[c.predicted], N: c.n})
			}
		}
		a.addScoreCounts(&out, b) // a bucket with scores has predictions
	}
	return out, nil
}

// SaveAlert keeps the records of state changes; nothing is stored.
func (a *asOf) SaveAlert(_ context.Context, rec store.AlertRecord, history bool) error {
	if history {
		rec.Data = slices.Clone(rec.Data)
		a.changes = append(a.changes, rec)
	}
	return nil
}

// Alerts returns nothing: every replay starts with no alert.
func (a *asOf) Alerts(context.Context) ([]store.AlertRecord, error) { return nil, nil }

// AlertHistory returns nothing: the replay keeps its own.
func (a *asOf) AlertHistory(context.Context, time.Time, time.Time, int) ([]store.AlertRecord, error) {
	return nil, nil
}

// TryLead always grants the evaluator lock: the replay evaluates alone.
func (a *asOf) TryLead(context.Context, string) (store.Lease, error) { return lease{}, nil }

type lease struct{}

func (lease) Alive(context.Context) error   { return nil }
func (lease) Release(context.Context) error { return nil }

// episodes turns the recorded state changes into each rule's episodes:
// one per firing, closed by the resolution (or retirement) that follows.
func (a *asOf) episodes() (map[string][]Episode, error) {
	out := map[string][]Episode{}
	open := map[string]int{}
	for _, rec := range a.changes {
		var al alerts.Alert
		if err := json.Unmarshal(rec.Data, &al); err != nil {
			return nil, fmt.Errorf("decode alert %s: %w", rec.Key, err)
		}
		i, firing := open[rec.Key]
		switch {
		case al.State == alerts.StateFiring && !firing:
			open[rec.Key] = len(out[rec.Rule])
			out[rec.Rule] = append(out[rec.Rule], Episode{Model: al.Model, Class: optional(al.Class), Predicted: optional(al.Predicted), FiringAt: al.StartsAt})
		case al.State != alerts.StateFiring && firing:
			end := al.EndsAt
			out[rec.Rule][i].ResolvedAt = &end
			delete(open, rec.Key)
		}
	}
	return out, nil
}

func optional(s string) *string {
	if s == "" {
		return nil
	}
	return &s
}

var _ alerts.Store = (*asOf)(nil)
