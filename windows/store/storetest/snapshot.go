package storetest

import (
	"errors"
	"slices"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// testSnapshot checks Store.Snapshot: a commit that completed before the
// call is in the snapshot; one made after fixedFunc ran, whether in
// fixedFunc itself (before the first read of readFunc) or between two
// reads, is not; the reads of one snapshot agree with each other; and
// readFunc's error comes back as it is.
func testSnapshot(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	b0 := at(0)

	// Before the snapshot: one prediction, labeled.
	ingestPredictions(t, s, at(time.Minute), pred(fraudModel, "t1", at(0), "fraud", "web"))
	ingestLabels(t, s, at(time.Minute), lab(fraudModel, "t1", "fraud", at(time.Minute)))
	before := store.Counts{
		Cells:     []store.Cell{cell(b0, "fraud", "fraud", 1)},
		Predicted: []store.PredictedCount{predicted(b0, "fraud", 1)},
	}

	fixedCalls := 0
	err := s.Snapshot(ctx, func() {
		fixedCalls++
		// After the snapshot is fixed, before anything is read: a new
		// model, a new prediction with its label, and a correction of t1.
		ensure(t, s, ticketModel, "billing", "outage")
		ingestPredictions(t, s, at(11*time.Minute), pred(fraudModel, "t2", at(10*time.Minute), "legit", "web"))
		ingestLabels(t, s, at(11*time.Minute),
			lab(fraudModel, "t2", "legit", at(11*time.Minute)),
			lab(fraudModel, "t1", "legit", at(11*time.Minute)))
	}, func(r store.SnapshotReader) error {
		if fixedCalls != 1 {
			t.Errorf("fixedFunc ran %d times before readFunc, want 1", fixedCalls)
		}
		wantSnapshot(t, "first read", r, before)
		// Between two reads of one snapshot.
		ingestPredictions(t, s, at(21*time.Minute), pred(fraudModel, "t3", at(20*time.Minute), "fraud", "app"))
		wantSnapshot(t, "second read", r, before)
		if _, err := r.Counts(ctx, all("no-such-model")); !errors.Is(err, store.ErrUnknownModel) {
			t.Errorf("Counts of an unregistered model in a snapshot: %v, want ErrUnknownModel", err)
		}
		return nil
	})
	if err != nil {
		t.Fatalf("Snapshot: %v", err)
	}
	if fixedCalls != 1 {
		t.Errorf("fixedFunc ran %d times, want 1", fixedCalls)
	}
	checkAfterSnapshot(t, s)
}

// wantSnapshot reads r and expects exactly the state before testSnapshot's
// call: the counts before and the fraud model alone.
func wantSnapshot(t *testing.T, what string, r store.SnapshotReader, before store.Counts) {
	t.Helper()
	ctx := t.Context()
	c, err := r.Counts(ctx, all(fraudModel))
	if err != nil {
		t.Fatalf("%s: Counts: %v", what, err)
	}
	wantCounts(t, what+": Counts", c, before)
	ms, err := r.Models(ctx)
	if err != nil {
		t.Fatalf("%s: Models: %v", what, err)
	}
	if len(ms) != 1 {
		t.Fatalf("%s: Models lists %d models, want only %s (%s is registered after the snapshot)", what, len(ms), fraudModel, ticketModel)
	}
	m := ms[0]
	if m.Name != fraudModel || !slices.Equal(m.Classes, []string{"legit", "fraud"}) ||
		m.Predictions != 1 || m.Labeled != 1 || !m.LatestAt.Equal(at(0)) {
		t.Errorf("%s: Models = %+v, want %s [legit fraud] with 1 prediction, 1 labeled, latest %s",
			what, m, fraudModel, at(0).Format(time.RFC3339))
	}
}

// checkAfterSnapshot checks the store after testSnapshot's snapshot: every
// commit shows outside it and in a fresh snapshot, and readFunc's error
// comes back as it is.
func checkAfterSnapshot(t *testing.T, s store.Store) {
	ctx := t.Context()
	b0, b10, b20 := at(0), at(10*time.Minute), at(20*time.Minute)
	// Outside, every commit shows: t1 corrected to legit, t2 labeled
	// legit, t3 unlabeled.
	wantCounts(t, "Counts after the snapshot", counts(t, s, all(fraudModel)), store.Counts{
		Cells: []store.Cell{cell(b0, "legit", "fraud", 1), cell(b10, "legit", "legit", 1)},
		Predicted: []store.PredictedCount{
			predicted(b0, "fraud", 1), predicted(b10, "legit", 1), predicted(b20, "fraud", 1),
		},
	})
	wantTotals(t, s, fraudModel, 3, 2, at(20*time.Minute))

	// A fresh snapshot sees what was committed before it.
	err := s.Snapshot(ctx, nil, func(r store.SnapshotReader) error {
		c, err := r.Counts(ctx, all(fraudModel))
		if err != nil {
			return err
		}
		wantCounts(t, "Counts in a later snapshot", c, counts(t, s, all(fraudModel)))
		return nil
	})
	if err != nil {
		t.Fatalf("Snapshot without fixedFunc: %v", err)
	}

	errGaveUp := errors.New("reader gave up")
	if err := s.Snapshot(ctx, nil, func(store.SnapshotReader) error { return errGaveUp }); !errors.Is(err, errGaveUp) {
		t.Errorf("Snapshot returned %v, want readFunc's error", err)
	}
}
