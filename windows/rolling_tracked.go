package windows

import (
	"context"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// TrackedStore is a store whose writers keep the tracker current: every
// call that changes counts runs through Commit, so its committed changes
// reach the windows exactly once, and every class list EnsureModel returns
// reaches SetClasses. Data flows one way, from the writer (the collector)
// through TrackedStore into the store and the tracker; the tracker never
// calls the writer back. Reads and the other calls go to the store as they
// are.
type TrackedStore struct {
	store.Store
	t *Tracker
}

// Track wraps s so that the changes written through it reach t.
func (t *Tracker) Track(s store.Store) *TrackedStore {
	return &TrackedStore{Store: s, t: t}
}

// EnsureModel registers model and classes in the store and passes the
// model's class list, in store order, to the tracker.
func (ts *TrackedStore) EnsureModel(ctx context.Context, model string, classes []string, maxClasses int) ([]string, error) {
	list, err := ts.Store.EnsureModel(ctx, model, classes, maxClasses)
	if err == nil {
		ts.t.SetClasses(model, list)
	}
	return list, err
}

// IngestPredictions stores a batch and applies its changes, moving each
// model's watermark on to the latest prediction it newly stored.
func (ts *TrackedStore) IngestPredictions(ctx context.Context, batch []store.Prediction, now time.Time) (store.PredictionResult, error) {
	var out store.PredictionResult
	err := ts.t.Commit(func() (store.Changes, map[string]time.Time, error) {
		var err error
		if out, err = ts.Store.IngestPredictions(ctx, batch, now); err != nil {
			return store.Changes{}, nil, err
		}
		latest := map[string]time.Time{}
		for i, o := range out.Outcomes {
			if p := &batch[i]; o == store.PredictionStored && p.At.After(latest[p.Model]) {
				latest[p.Model] = p.At
			}
		}
		return out.Changes, latest, nil
	})
	return out, err
}

// IngestLabels applies a batch of label versions and their changes.
func (ts *TrackedStore) IngestLabels(ctx context.Context, batch []store.Label, now time.Time) (store.LabelResult, error) {
	var out store.LabelResult
	err := ts.t.Commit(func() (store.Changes, map[string]time.Time, error) {
		var err error
		out, err = ts.Store.IngestLabels(ctx, batch, now)
		return out.Changes, nil, err
	})
	return out, err
}

// ApplyLabelTimeout gives overdue predictions their implied label and
// applies the changes.
func (ts *TrackedStore) ApplyLabelTimeout(ctx context.Context, model, label string, timeout time.Duration, now time.Time) (int64, store.Changes, error) {
	var (
		n  int64
		ch store.Changes
	)
	err := ts.t.Commit(func() (store.Changes, map[string]time.Time, error) {
		var err error
		n, ch, err = ts.Store.ApplyLabelTimeout(ctx, model, label, timeout, now)
		return ch, nil, err
	})
	return n, ch, err
}
