package backtest

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/alerts"
	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// chunkSize is how many events the reader hands over at a time, and
// flushSize how many count changes the sweep gathers before applying them
// to the windows.
const (
	chunkSize = 4096
	flushSize = 4096
)

// replayModel sweeps one model's events in time order and, at each
// scheduled time, evaluates the model's rules against the windows as they
// stood then.
func replayModel(ctx context.Context, opts Options, info store.ModelInfo, plans []*plan) error {
	var clock time.Time
	now := func() time.Time { return clock }
	topts := opts.Tracker
	topts.Clock, topts.Now, topts.Store = windows.ClockWall, now, nil
	tr, err := windows.NewTracker(topts)
	if err != nil {
		return fmt.Errorf("build windows: %w", err)
	}
	mo := tr.Options(info.Name)
	tr.SetClasses(info.Name, info.Classes)
	start := startOf(opts.From, mo, plans)
	as := newAsOf(info, mo.Bucket, start)
	clock = opts.From.UTC()
	managers, next, err := managersOf(opts, plans, as, tr, now)
	if err != nil {
		return err
	}

	rctx, cancel := context.WithCancel(ctx)
	defer cancel()
	f := newFeed(rctx, opts.Store, eventQuery(opts, info.Name, start, mo.Bucket, plans))
	var pending store.Changes
	flush := func(at time.Time) {
		clock = at
		if pendingLen(&pending) > 0 {
			tr.Apply(pending, nil)
			pending = store.Changes{Cells: pending.Cells[:0], Predicted: pending.Predicted[:0], Scores: pending.Scores[:0],
				Calibration: pending.Calibration[:0], Brier: pending.Brier[:0]}
		}
	}
	for {
		t, ok := earliest(next, opts.To)
		if !ok {
			break
		}
		for {
			e, err := f.peek()
			if err != nil {
				return readError(err, info.Name, start)
			}
			if e == nil || e.At.After(t) {
				break
			}
			as.apply(e)
			addChanges(&pending, info.Name, e)
			addScoreChanges(&pending, info.Name, as.info.Classes, e)
			if pendingLen(&pending) >= flushSize {
				flush(e.At)
			}
			f.pop()
		}
		flush(t)
		for i, p := range plans {
			if !next[i].Equal(t) {
				continue
			}
			if err := managers[i].Evaluate(ctx, t); err != nil {
				return fmt.Errorf("evaluate at %s: %w", t.Format(time.RFC3339), err)
			}
			next[i] = p.schedule.Next(t)
		}
	}
	eps, err := as.episodes()
	if err != nil {
		return err
	}
	for _, p := range plans {
		p.report.Episodes = append(p.report.Episodes, eps[p.rule.Name]...)
	}
	return nil
}

// eventQuery selects the events the replay of plans needs: scores only
// when a rule reads them, and prediction events grouped by the longest
// step that divides every evaluation time (store.EventQuery.Step), so
// that the counts at each evaluation are the same as event by event.
func eventQuery(opts Options, model string, start time.Time, bucket time.Duration, plans []*plan) store.EventQuery {
	q := store.EventQuery{Model: model, From: start, To: windows.BucketStart(opts.To, bucket).Add(bucket), Until: opts.To}
	var grain int64
	for _, p := range plans {
		grain = gcd(grain, p.grain)
		q.Scores = q.Scores || readsScores(p.rule)
	}
	q.Step = time.Duration(grain) * time.Microsecond
	return q
}

// readsScores reports whether a rule reads the score aggregates: a
// score_shift rule, or a rule on a metric computed from scores.
func readsScores(r alerts.Rule) bool {
	if r.Kind == alerts.KindScoreShift {
		return true
	}
	d, ok := windows.LookupMetric(r.Metric)
	return ok && d.FromScores
}

// managersOf builds one alert manager per plan over the as-of store and
// the tracker, and returns them with each plan's first evaluation time.
func managersOf(opts Options, plans []*plan, as *asOf, tr *windows.Tracker, now func() time.Time) ([]*alerts.Manager, []time.Time, error) {
	managers := make([]*alerts.Manager, len(plans))
	next := make([]time.Time, len(plans))
	for i, p := range plans {
		var err error
		managers[i], err = alerts.New(alerts.Options{
			Store: as, View: tr.View, Watermark: tr.Watermark, Rules: []alerts.Rule{p.rule}, Windows: opts.Windows,
			Confidence: opts.Confidence, Now: now,
		})
		if err != nil {
			return nil, nil, err
		}
		next[i] = first(p.schedule, opts.From)
	}
	return managers, next, nil
}

// readError explains a failed event read; a purge that took rows the
// replay needs is the caller's to fix (a shorter window or a later --from).
func readError(err error, model string, start time.Time) error {
	if errors.Is(err, store.ErrPurged) {
		return fmt.Errorf("the rules' windows reach back to %s, before the raw rows the store retains for %s (%w): %w",
			start.Format(time.RFC3339), model, err, ErrInput)
	}
	return fmt.Errorf("read events: %w", err)
}

// startOf returns the oldest bucket the replay needs: the reach of the
// model's longest window before from, or the start of a rule's fixed
// reference range when older.
func startOf(from time.Time, mo windows.ModelOptions, plans []*plan) time.Time {
	var reach time.Duration
	for _, w := range mo.Windows {
		reach = max(reach, w.Span())
	}
	start := windows.BucketStart(from.Add(-reach), mo.Bucket)
	for _, p := range plans {
		if back := windows.BucketStart(from.Add(-p.rule.Lookback()), mo.Bucket); back.Before(start) {
			start = back // a cusum reads its own matured buckets
		}
		if ref := p.rule.Reference; ref.Window == "" && !ref.From.IsZero() && ref.From.Before(start) {
			start = windows.BucketStart(ref.From, mo.Bucket)
		}
	}
	return start
}

// earliest returns the first of the next scheduled times before to.
func earliest(next []time.Time, to time.Time) (time.Time, bool) {
	var t time.Time
	for _, n := range next {
		if n.Before(to) && (t.IsZero() || n.Before(t)) {
			t = n
		}
	}
	return t, !t.IsZero()
}

// addChanges adds an event's count changes to ch.
func addChanges(ch *store.Changes, model string, e *store.Event) {
	if e.Kind == store.EventPrediction {
		ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: model, Bucket: e.Bucket, Predicted: e.Predicted, N: e.Count})
		return
	}
	if e.Old != "" {
		ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: e.Bucket, Actual: e.Old, Predicted: e.Predicted, N: -1})
	}
	ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: e.Bucket, Actual: e.Actual, Predicted: e.Predicted, N: e.Count})
}

// pendingLen is the number of changes gathered in ch.
func pendingLen(ch *store.Changes) int {
	return len(ch.Cells) + len(ch.Predicted) + len(ch.Scores) + len(ch.Calibration) + len(ch.Brier)
}

// feed reads a model's events on its own goroutine, a chunk at a time, so
// the database streams while the sweep evaluates.
type feed struct {
	ch   <-chan []store.Event
	errc <-chan error
	buf  []store.Event
	done bool
}

func newFeed(ctx context.Context, st store.Store, q store.EventQuery) *feed {
	ch := make(chan []store.Event, 2)
	errc := make(chan error, 1)
	go func() {
		defer close(ch)
		chunk := make([]store.Event, 0, chunkSize)
		send := func() error {
			select {
			case ch <- chunk:
				chunk = make([]store.Event, 0, chunkSize)
				return nil
			case <-ctx.Done():
				return ctx.Err()
			}
		}
		err := st.Events(ctx, q, func(e *store.Event) error {
			chunk = append(chunk, *e)
			if len(chunk) == chunkSize {
				return send()
			}
			return nil
		})
		if err == nil && len(chunk) > 0 {
			err = send()
		}
		errc <- err
	}()
	return &feed{ch: ch, errc: errc}
}

// peek returns the next event, nil at the end of the stream, or the
// reader's error.
func (f *feed) peek() (*store.Event, error) {
	for len(f.buf) == 0 {
		if f.done {
			return nil, nil
		}
		chunk, ok := <-f.ch
		if !ok {
			f.done = true
			if err := <-f.errc; err != nil {
				return nil, err
			}
			return nil, nil
		}
		f.buf = chunk
	}
	return &f.buf[0], nil
}

func (f *feed) pop() { f.buf = f.buf[1:] }
