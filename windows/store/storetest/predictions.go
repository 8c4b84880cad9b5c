package storetest

import (
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

func testPredictions(t *testing.T, s store.Store) {
	ensure(t, s, fraudModel, "legit", "fraud")
	b0, b1, b2 := at(0), at(5*time.Minute), at(10*time.Minute)
	scored := pred(fraudModel, "a1", at(time.Minute), "fraud", "web")
	scored.Scores = map[string]float64{"fraud": 0.91, "legit": 0.09}
	otherClass := scored
	otherClass.Predicted = "legit"

	res := ingestPredictions(t, s, at(time.Hour),
		scored,
		pred(fraudModel, "a2", at(7*time.Minute), "legit", "app"),
		scored,     // same line again in the batch: duplicate
		otherClass, // same id, other class: conflict, the first stands
	)
	wantPredictionOutcomes(t, res.Outcomes, store.PredictionStored, store.PredictionStored, store.PredictionDuplicate, store.PredictionConflict)
	wantChanges(t, res.Changes, nil, []store.PredictedDelta{predDelta(fraudModel, b0, "fraud", 1), predDelta(fraudModel, b1, "legit", 1)})

	retried := scored // a client retry without "at": the receive time differs
	retried.At, retried.AtDefaulted = at(119*time.Minute), true
	retried.Bucket = retried.At.Truncate(bucketWidth)
	otherAt := scored
	otherAt.At = at(2 * time.Minute)
	otherSegment := scored
	otherSegment.Segment = "app"
	otherScores := scored
	otherScores.Scores = map[string]float64{"fraud": 0.9, "legit": 0.1}
	noScores := scored
	noScores.Scores = nil
	defaultedConflict := pred(fraudModel, "a2", at(100*time.Minute), "fraud", "app")
	defaultedConflict.AtDefaulted = true

	res = ingestPredictions(t, s, at(2*time.Hour),
		retried, otherAt, otherSegment, otherScores, noScores,
		pred(fraudModel, "a3", at(12*time.Minute), "fraud", ""),
		defaultedConflict, // AtDefaulted excuses at only, not the class
	)
	wantPredictionOutcomes(t, res.Outcomes,
		store.PredictionDuplicate, store.PredictionConflict, store.PredictionConflict, store.PredictionConflict,
		store.PredictionConflict, store.PredictionStored, store.PredictionConflict)
	wantChanges(t, res.Changes, nil, []store.PredictedDelta{predDelta(fraudModel, b2, "fraud", 1)})

	wantCounts(t, "Counts", counts(t, s, all(fraudModel)), store.Counts{
		Predicted: []store.PredictedCount{predicted(b0, "fraud", 1), predicted(b1, "legit", 1), predicted(b2, "fraud", 1)},
	})
	wantTotals(t, s, fraudModel, 3, 0, at(12*time.Minute))

	// Labels join against the first-stored content: a1 stays "fraud" in
	// segment "web".
	lres := ingestLabels(t, s, at(3*time.Hour), lab(fraudModel, "a1", "legit", at(150*time.Minute)))
	wantChanges(t, lres.Changes, []store.CellDelta{cellDelta(fraudModel, b0, "legit", "fraud", 1)}, nil)
	web := "web"
	q := all(fraudModel)
	q.Segment = &web
	wantCounts(t, "Counts of segment web", counts(t, s, q), store.Counts{
		Cells:     []store.Cell{cell(b0, "legit", "fraud", 1)},
		Predicted: []store.PredictedCount{predicted(b0, "fraud", 1)},
	})
	wantVerifyClean(t, s)
}
