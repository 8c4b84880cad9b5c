package storetest

import (
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

func testPurgeRaw(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	b0, b1, b2 := at(0), at(5*time.Minute), at(10*time.Minute)
	ingestPredictions(t, s, at(15*time.Minute),
		pred(fraudModel, "r1", at(1*time.Minute), "fraud", ""),
		pred(fraudModel, "r2", at(2*time.Minute), "legit", ""),
		pred(fraudModel, "r3", at(6*time.Minute), "fraud", ""),
		pred(fraudModel, "r4", at(11*time.Minute), "fraud", ""),
	)
	ingestLabels(t, s, at(20*time.Minute),
		lab(fraudModel, "r1", "fraud", at(20*time.Minute)),
		lab(fraudModel, "r3", "legit", at(20*time.Minute)),
		lab(fraudModel, "r4", "fraud", at(20*time.Minute)),
		lab(fraudModel, "late", "legit", at(20*time.Minute)),
	)
	before := counts(t, s, all(fraudModel))

	n, err := s.PurgeRaw(ctx, fraudModel, b2)
	if err != nil {
		t.Fatalf("PurgeRaw: %v", err)
	}
	if n != 3 {
		t.Errorf("PurgeRaw(cutoff +10m) = %d, want 3 (r1, r2, r3)", n)
	}
	wantCounts(t, "Counts after purge", counts(t, s, all(fraudModel)), before)
	wantCounts(t, "CountsAsOf over purged buckets", countsAsOf(t, s, store.Query{Model: fraudModel, From: b0, To: b2}, farFuture()), store.Counts{})
	kept := store.Query{Model: fraudModel, From: b2, To: at(time.Hour)}
	wantCounts(t, "CountsAsOf over kept buckets", countsAsOf(t, s, kept, farFuture()), counts(t, s, kept))
	wantTotals(t, s, fraudModel, 1, 1, at(11*time.Minute))
	wantVerifyClean(t, s)

	// The purged prediction is no longer known: its label waits.
	lres := ingestLabels(t, s, at(30*time.Minute), lab(fraudModel, "r2", "fraud", at(30*time.Minute)))
	wantLabelOutcomes(t, lres.Outcomes, store.LabelEarly)
	// A late line for a purged bucket counts on top of the kept cells;
	// the early label, untouched by the purge, joins it.
	pres := ingestPredictions(t, s, at(40*time.Minute), pred(fraudModel, "late", at(3*time.Minute), "fraud", ""))
	wantChanges(t, pres.Changes,
		[]store.CellDelta{cellDelta(fraudModel, b0, "legit", "fraud", 1)},
		[]store.PredictedDelta{predDelta(fraudModel, b0, "fraud", 1)})
	wantCounts(t, "Counts after a late prediction", counts(t, s, all(fraudModel)), store.Counts{
		Cells:     []store.Cell{cell(b0, "fraud", "fraud", 1), cell(b0, "legit", "fraud", 1), cell(b1, "legit", "fraud", 1), cell(b2, "fraud", "fraud", 1)},
		Predicted: []store.PredictedCount{predicted(b0, "fraud", 2), predicted(b0, "legit", 1), predicted(b1, "fraud", 1), predicted(b2, "fraud", 1)},
	})
	wantVerifyClean(t, s)

	n, err = s.PurgeRaw(ctx, fraudModel, b1)
	if err != nil {
		t.Fatalf("second PurgeRaw: %v", err)
	}
	if n != 1 {
		t.Errorf("second PurgeRaw(cutoff +5m) = %d, want 1 (late)", n)
	}
	wantTotals(t, s, fraudModel, 1, 1, at(11*time.Minute))
	wantVerifyClean(t, s)
}
