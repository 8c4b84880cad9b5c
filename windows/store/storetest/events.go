package storetest

import (
	"cmp"
	"errors"
	"fmt"
	"maps"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// testEvents checks Store.Events: a hand-worked history event by event
// (early label, correction, an older version arriving late, implied labels
// and a real label replacing one), the Until and bucket bounds, the purge
// cutoff, and random histories whose events, folded up to any time T,
// must give CountsAsOf at T.
func testEvents(t *testing.T, newStore func(t *testing.T) store.Store) {
	t.Run("Worked", func(t *testing.T) { testEventsWorked(t, newStore(t)) })
	t.Run("Purged", func(t *testing.T) { testEventsPurged(t, newStore(t)) })
	t.Run("AsOf", func(t *testing.T) { testEventsAsOf(t, newStore) })
}

// wantEvent is the part of an Event the worked test checks.
type wantEvent struct {
	at                       time.Duration
	kind                     store.EventKind
	predicted, old, actual   string
	implied                  bool
	predictionAt, bucketFrom time.Duration
}

func (w wantEvent) String() string {
	return fmt.Sprintf("+%s kind %d pred %s@+%s bucket +%s %q→%q implied %t",
		w.at, w.kind, w.predicted, w.predictionAt, w.bucketFrom, w.old, w.actual, w.implied)
}

// readEvents returns q's events as wantEvents relative to base.
func readEvents(t *testing.T, s store.Store, q store.EventQuery) []wantEvent {
	t.Helper()
	var out []wantEvent
	err := s.Events(t.Context(), q, func(e *store.Event) error {
		out = append(out, wantEvent{
			at: e.At.Sub(base()), kind: e.Kind, predicted: e.Predicted, old: e.Old, actual: e.Actual,
			implied: e.Implied, predictionAt: e.PredictionAt.Sub(base()), bucketFrom: e.Bucket.Sub(base()),
		})
		return nil
	})
	if err != nil {
		t.Fatalf("Events(%s): %v", q.Model, err)
	}
	return out
}

func testEventsWorked(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	m := time.Minute
	// e4's label comes before its prediction and waits for it.
	ingestLabels(t, s, at(2*m), lab(fraudModel, "e4", "legit", at(1*m)))
	ingestPredictions(t, s, at(21*m),
		pred(fraudModel, "e1", at(0), "fraud", ""),
		pred(fraudModel, "e2", at(10*m), "legit", ""),
		pred(fraudModel, "e4", at(15*m), "legit", "web"),
		pred(fraudModel, "e3", at(20*m), "fraud", ""),
	)
	// e1: fraud at +5m, corrected to legit at +50m; a fraud version dated
	// +40m arrives last and keeps the class, so it makes no event.
	ingestLabels(t, s, at(60*m),
		lab(fraudModel, "e1", "fraud", at(5*m)),
		lab(fraudModel, "e1", "legit", at(50*m)),
		lab(fraudModel, "e1", "fraud", at(40*m)),
	)
	// e2 and e3 get implied legit labels at +70m and +80m; e3's real fraud
	// label at +100m replaces its implied one.
	if _, _, err := s.ApplyLabelTimeout(ctx, fraudModel, "legit", time.Hour, at(90*m)); err != nil {
		t.Fatalf("ApplyLabelTimeout: %v", err)
	}
	ingestLabels(t, s, at(101*m), lab(fraudModel, "e3", "fraud", at(100*m)))

	P, L := store.EventPrediction, store.EventLabel
	want := []wantEvent{
		{at: 0, kind: P, predicted: "fraud"},
		{at: 5 * m, kind: L, predicted: "fraud", actual: "fraud"},
		{at: 10 * m, kind: P, predicted: "legit", predictionAt: 10 * m, bucketFrom: 10 * m},
		{at: 15 * m, kind: P, predicted: "legit", predictionAt: 15 * m, bucketFrom: 15 * m},
		{at: 15 * m, kind: L, predicted: "legit", actual: "legit", predictionAt: 15 * m, bucketFrom: 15 * m},
		{at: 20 * m, kind: P, predicted: "fraud", predictionAt: 20 * m, bucketFrom: 20 * m},
		{at: 50 * m, kind: L, predicted: "fraud", old: "fraud", actual: "legit"},
		{at: 70 * m, kind: L, predicted: "legit", actual: "legit", implied: true, predictionAt: 10 * m, bucketFrom: 10 * m},
		{at: 80 * m, kind: L, predicted: "fraud", actual: "legit", implied: true, predictionAt: 20 * m, bucketFrom: 20 * m},
		{at: 100 * m, kind: L, predicted: "fraud", old: "legit", actual: "fraud", predictionAt: 20 * m, bucketFrom: 20 * m},
	}
	q := store.EventQuery{Model: fraudModel, From: at(0), To: at(time.Hour), Until: farFuture()}
	checkEvents(t, "every event", readEvents(t, s, q), want)
	q.Until = at(80 * m)
	checkEvents(t, "events before +80m", readEvents(t, s, q), want[:8])
	q.From, q.To, q.Until = at(10*m), at(20*m), farFuture()
	checkEvents(t, "events of buckets [+10m, +20m)", readEvents(t, s, q), []wantEvent{want[2], want[3], want[4], want[7]})

	var segment string
	var scores map[string]float64
	stop := errors.New("stop")
	err := s.Events(ctx, store.EventQuery{Model: fraudModel, From: at(15 * m), To: at(20 * m), Until: farFuture(), Scores: true},
		func(e *store.Event) error { segment, scores = e.Segment, e.Scores; return stop })
	if !errors.Is(err, stop) {
		t.Errorf("Events returned %v, want the callback's own error", err)
	}
	if segment != "web" || scores != nil {
		t.Errorf("e4's event: segment %q scores %v, want web and none", segment, scores)
	}
	if err := s.Events(ctx, store.EventQuery{Model: "nobody", To: farFuture(), Until: farFuture()}, func(*store.Event) error { return nil }); !errors.Is(err, store.ErrUnknownModel) {
		t.Errorf("Events of an unknown model: %v, want ErrUnknownModel", err)
	}
}

func checkEvents(t *testing.T, what string, got, want []wantEvent) {
	t.Helper()
	if !slices.Equal(got, want) {
		t.Errorf("%s:\n got  %s\n want %s", what, joinEvents(got), joinEvents(want))
	}
}

func joinEvents(es []wantEvent) string {
	parts := make([]string, len(es))
	for i, e := range es {
		parts[i] = e.String()
	}
	return "\n  " + strings.Join(parts, "\n  ")
}

// testEventsPurged: events of purged buckets are refused with ErrPurged;
// those from the cutoff on are still read.
func testEventsPurged(t *testing.T, s store.Store) {
	ensure(t, s, fraudModel, "legit", "fraud")
	ingestPredictions(t, s, at(20*time.Minute),
		pred(fraudModel, "r1", at(1*time.Minute), "fraud", ""),
		pred(fraudModel, "r2", at(11*time.Minute), "fraud", ""),
	)
	if _, err := s.PurgeRaw(t.Context(), fraudModel, at(10*time.Minute)); err != nil {
		t.Fatalf("PurgeRaw: %v", err)
	}
	q := store.EventQuery{Model: fraudModel, From: at(0), To: farFuture(), Until: farFuture()}
	if err := s.Events(t.Context(), q, func(*store.Event) error { return nil }); !errors.Is(err, store.ErrPurged) {
		t.Errorf("Events from before the purge cutoff: %v, want ErrPurged", err)
	}
	q.From = at(10 * time.Minute)
	if got := readEvents(t, s, q); len(got) != 1 || got[0].predictionAt != 11*time.Minute {
		t.Errorf("Events from the purge cutoff on: %s, want r2's prediction only", joinEvents(got))
	}
}

// testEventsAsOf folds the events of random histories up to several times
// T and compares the result with CountsAsOf at T, which the suite checks
// against its reference model.
func testEventsAsOf(t *testing.T, newStore func(t *testing.T) store.Store) {
	for _, seed := range []uint64{21, 22, 23} {
		t.Run(fmt.Sprintf("seed%d", seed), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(seed, 0x6576656e7473))
			s := newStore(t)
			for _, m := range []string{fraudModel, ticketModel} {
				ensure(t, s, m, classesOf(m)...)
			}
			now := at(3 * time.Hour)
			for _, batch := range batches(rng, randomHistory(rng)) {
				deliver(t, s, batch, now, tally{cells: map[changeCell]int64{}, pred: map[changePred]int64{}})
				if rng.IntN(4) == 0 {
					model := []string{fraudModel, ticketModel}[rng.IntN(2)]
					if _, _, err := s.ApplyLabelTimeout(t.Context(), model, classesOf(model)[0], time.Hour, now); err != nil {
						t.Fatalf("ApplyLabelTimeout: %v", err)
					}
				}
				now = now.Add(time.Duration(rng.IntN(900)) * time.Second)
			}
			times := append(asOfTimes(), at(90*time.Minute), at(4*time.Hour))
			for _, model := range []string{fraudModel, ticketModel} {
				for _, T := range times {
					q := store.EventQuery{Model: model, From: all(model).From, To: farFuture(), Until: T.Add(time.Microsecond)}
					want := countsAsOf(t, s, all(model), T)
					wantCounts(t, fmt.Sprintf("%s events folded up to %s", model, T.Format(time.RFC3339)), foldEvents(t, s, q), want)
					q.Step = 10 * time.Minute
					wantCounts(t, fmt.Sprintf("%s events grouped by %s folded up to %s", model, q.Step, T.Format(time.RFC3339)), foldEvents(t, s, q), want)
				}
			}
		})
	}
}

// checkGroup checks an event's Count and, for a prediction event that
// stands for several, that it comes at the end of the step holding its
// latest at (store.EventQuery.Step).
func checkGroup(q store.EventQuery, e *store.Event) error {
	switch {
	case e.Count < 1 || (e.Kind == store.EventLabel && e.Count != 1):
		return fmt.Errorf("event %+v: count %d", *e, e.Count)
	case e.Kind == store.EventLabel || e.At.Equal(e.PredictionAt):
		return nil
	case q.Step <= 0 || e.At.UnixMicro()%q.Step.Microseconds() != 0 || !e.PredictionAt.Before(e.At) || !e.At.Add(-q.Step).Before(e.PredictionAt):
		return fmt.Errorf("prediction event at %s (latest at %s) is not the end of its %s step", e.At, e.PredictionAt, q.Step)
	}
	return nil
}

// foldEvents adds up q's events into counts as CountsAsOf reports them.
func foldEvents(t *testing.T, s store.Store, q store.EventQuery) store.Counts {
	t.Helper()
	type cellKey struct {
		bucket            int64
		actual, predicted string
	}
	cells := map[cellKey]int64{}
	var last time.Time
	err := s.Events(t.Context(), q, func(e *store.Event) error {
		if e.At.Before(last) {
			return fmt.Errorf("event at %s after one at %s", e.At, last)
		}
		last = e.At
		if err := checkGroup(q, e); err != nil {
			return err
		}
		b := e.Bucket.UnixNano()
		if e.Kind == store.EventPrediction {
			cells[cellKey{b, "", e.Predicted}] += e.Count
			return nil
		}
		if e.Old != "" {
			cells[cellKey{b, e.Old, e.Predicted}]--
		}
		cells[cellKey{b, e.Actual, e.Predicted}]++
		return nil
	})
	if err != nil {
		t.Fatalf("Events(%s): %v", q.Model, err)
	}
	var out store.Counts
	for _, k := range slices.SortedFunc(maps.Keys(cells), func(x, y cellKey) int {
		return cmp.Or(cmp.Compare(x.bucket, y.bucket), cmp.Compare(x.actual, y.actual), cmp.Compare(x.predicted, y.predicted))
	}) {
		n := cells[k]
		switch {
		case n == 0:
		case k.actual == "":
			out.Predicted = append(out.Predicted, store.PredictedCount{Bucket: time.Unix(0, k.bucket).UTC(), Predicted: k.predicted, N: n})
		default:
			out.Cells = append(out.Cells, store.Cell{Bucket: time.Unix(0, k.bucket).UTC(), Actual: k.actual, Predicted: k.predicted, N: n})
		}
	}
	return out
}
