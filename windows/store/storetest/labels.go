package storetest

import (
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// testLabels walks one model's label history through matches, duplicates
// and corrections, batch by batch.
func testLabels(t *testing.T, s store.Store) {
	ensure(t, s, fraudModel, "legit", "fraud")
	b0, b1 := at(0), at(5*time.Minute)
	ingestPredictions(t, s, at(10*time.Minute),
		pred(fraudModel, "x1", at(1*time.Minute), "fraud", ""),
		pred(fraudModel, "x2", at(2*time.Minute), "legit", ""),
		pred(fraudModel, "x3", at(3*time.Minute), "legit", ""),
		pred(fraudModel, "x4", at(6*time.Minute), "fraud", ""),
	)
	steps := []struct {
		name     string
		labels   []store.Label
		outcomes []store.LabelOutcome
		changes  []store.CellDelta
	}{
		{
			name:     "first label joins, its repeat is a duplicate",
			labels:   []store.Label{lab(fraudModel, "x1", "fraud", at(20*time.Minute)), lab(fraudModel, "x1", "fraud", at(20*time.Minute))},
			outcomes: []store.LabelOutcome{store.LabelMatched, store.LabelDuplicate},
			changes:  []store.CellDelta{cellDelta(fraudModel, b0, "fraud", "fraud", 1)},
		},
		{
			name:     "a later different label corrects: old cell -1, new cell +1",
			labels:   []store.Label{lab(fraudModel, "x1", "legit", at(60*time.Minute))},
			outcomes: []store.LabelOutcome{store.LabelCorrected},
			changes:  []store.CellDelta{cellDelta(fraudModel, b0, "fraud", "fraud", -1), cellDelta(fraudModel, b0, "legit", "fraud", 1)},
		},
		{
			// The last line checks that the newer "legit" version became
			// the one later versions are ranked against.
			name: "known, older and same-class versions leave the current label",
			labels: []store.Label{
				lab(fraudModel, "x1", "fraud", at(20*time.Minute)),
				lab(fraudModel, "x1", "fraud", at(10*time.Minute)),
				lab(fraudModel, "x1", "legit", at(90*time.Minute)),
				lab(fraudModel, "x1", "fraud", at(80*time.Minute)),
			},
			outcomes: []store.LabelOutcome{store.LabelDuplicate, store.LabelDuplicate, store.LabelDuplicate, store.LabelDuplicate},
		},
		{
			name: "equal at: the greater actual wins whatever the arrival order",
			labels: []store.Label{
				lab(fraudModel, "x2", "fraud", at(30*time.Minute)),
				lab(fraudModel, "x2", "legit", at(30*time.Minute)),
				lab(fraudModel, "x3", "legit", at(30*time.Minute)),
				lab(fraudModel, "x3", "fraud", at(30*time.Minute)),
			},
			outcomes: []store.LabelOutcome{store.LabelMatched, store.LabelCorrected, store.LabelMatched, store.LabelDuplicate},
			changes:  []store.CellDelta{cellDelta(fraudModel, b0, "legit", "legit", 2)},
		},
		{
			name:     "a label and its correction in one batch net out",
			labels:   []store.Label{lab(fraudModel, "x4", "legit", at(40*time.Minute)), lab(fraudModel, "x4", "fraud", at(50*time.Minute))},
			outcomes: []store.LabelOutcome{store.LabelMatched, store.LabelCorrected},
			changes:  []store.CellDelta{cellDelta(fraudModel, b1, "fraud", "fraud", 1)},
		},
	}
	for i, st := range steps {
		res := ingestLabels(t, s, at(time.Duration(2+i)*time.Hour), st.labels...)
		t.Run(st.name, func(t *testing.T) {
			wantLabelOutcomes(t, res.Outcomes, st.outcomes...)
			wantChanges(t, res.Changes, st.changes, nil)
		})
	}
	wantLabelHistory(t, s, b0, b1)
}

// wantLabelHistory checks testLabels' final counts and its history as of
// earlier times.
func wantLabelHistory(t *testing.T, s store.Store, b0, b1 time.Time) {
	t.Helper()
	preds := []store.PredictedCount{predicted(b0, "fraud", 1), predicted(b0, "legit", 2), predicted(b1, "fraud", 1)}
	final := store.Counts{
		Cells:     []store.Cell{cell(b0, "legit", "fraud", 1), cell(b0, "legit", "legit", 2), cell(b1, "fraud", "fraud", 1)},
		Predicted: preds,
	}
	wantCounts(t, "Counts", counts(t, s, all(fraudModel)), final)
	// Every version is kept: as of earlier times the older versions count.
	asOf := []struct {
		when time.Duration
		want store.Counts
	}{
		{2 * time.Minute, store.Counts{Predicted: []store.PredictedCount{predicted(b0, "fraud", 1), predicted(b0, "legit", 1)}}},
		{15 * time.Minute, store.Counts{Cells: []store.Cell{cell(b0, "fraud", "fraud", 1)}, Predicted: preds}},
		{45 * time.Minute, store.Counts{Cells: []store.Cell{cell(b0, "fraud", "fraud", 1), cell(b0, "legit", "legit", 2), cell(b1, "legit", "fraud", 1)}, Predicted: preds}},
		{85 * time.Minute, store.Counts{Cells: []store.Cell{cell(b0, "fraud", "fraud", 1), cell(b0, "legit", "legit", 2), cell(b1, "fraud", "fraud", 1)}, Predicted: preds}},
		{100 * time.Minute, final},
	}
	for _, a := range asOf {
		wantCounts(t, "CountsAsOf "+a.when.String(), countsAsOf(t, s, all(fraudModel), at(a.when)), a.want)
	}
	wantCounts(t, "CountsAsOf far future", countsAsOf(t, s, all(fraudModel), farFuture()), final)
	wantTotals(t, s, fraudModel, 4, 4, at(6*time.Minute))
	wantVerifyClean(t, s)
}

func testEarlyLabels(t *testing.T, s store.Store) {
	ensure(t, s, fraudModel, "legit", "fraud")
	b1 := at(5 * time.Minute)
	res := ingestLabels(t, s, at(time.Hour),
		lab(fraudModel, "e1", "fraud", at(20*time.Minute)),
		lab(fraudModel, "e1", "fraud", at(20*time.Minute)), // the held version again
		lab(fraudModel, "e1", "legit", at(40*time.Minute)),
		lab(fraudModel, "e2", "legit", at(30*time.Minute)),
		lab(fraudModel, "e2", "fraud", at(30*time.Minute)),
	)
	wantLabelOutcomes(t, res.Outcomes, store.LabelEarly, store.LabelDuplicate, store.LabelEarly, store.LabelEarly, store.LabelEarly)
	wantChanges(t, res.Changes, nil, nil)
	wantCounts(t, "Counts with early labels only", counts(t, s, all(fraudModel)), store.Counts{})
	wantTotals(t, s, fraudModel, 0, 0, time.Time{})

	// The predictions arrive: each joins its latest early version.
	pres := ingestPredictions(t, s, at(2*time.Hour),
		pred(fraudModel, "e1", at(5*time.Minute), "fraud", ""),
		pred(fraudModel, "e1", at(5*time.Minute), "fraud", ""),
		pred(fraudModel, "e2", at(6*time.Minute), "legit", ""),
		pred(fraudModel, "e3", at(7*time.Minute), "fraud", ""),
	)
	wantPredictionOutcomes(t, pres.Outcomes, store.PredictionStored, store.PredictionDuplicate, store.PredictionStored, store.PredictionStored)
	wantChanges(t, pres.Changes,
		[]store.CellDelta{cellDelta(fraudModel, b1, "legit", "fraud", 1), cellDelta(fraudModel, b1, "legit", "legit", 1)},
		[]store.PredictedDelta{predDelta(fraudModel, b1, "fraud", 2), predDelta(fraudModel, b1, "legit", 1)})

	// Joined early versions are label versions like any other.
	res = ingestLabels(t, s, at(3*time.Hour),
		lab(fraudModel, "e1", "fraud", at(20*time.Minute)),
		lab(fraudModel, "e1", "fraud", at(50*time.Minute)),
	)
	wantLabelOutcomes(t, res.Outcomes, store.LabelDuplicate, store.LabelCorrected)
	wantChanges(t, res.Changes, []store.CellDelta{cellDelta(fraudModel, b1, "legit", "fraud", -1), cellDelta(fraudModel, b1, "fraud", "fraud", 1)}, nil)

	preds := []store.PredictedCount{predicted(b1, "fraud", 2), predicted(b1, "legit", 1)}
	wantCounts(t, "Counts", counts(t, s, all(fraudModel)), store.Counts{
		Cells:     []store.Cell{cell(b1, "fraud", "fraud", 1), cell(b1, "legit", "legit", 1)},
		Predicted: preds,
	})
	wantCounts(t, "CountsAsOf 30m", countsAsOf(t, s, all(fraudModel), at(30*time.Minute)), store.Counts{
		Cells:     []store.Cell{cell(b1, "fraud", "fraud", 1), cell(b1, "legit", "legit", 1)},
		Predicted: preds,
	})
	wantCounts(t, "CountsAsOf 45m", countsAsOf(t, s, all(fraudModel), at(45*time.Minute)), store.Counts{
		Cells:     []store.Cell{cell(b1, "legit", "fraud", 1), cell(b1, "legit", "legit", 1)},
		Predicted: preds,
	})
	wantTotals(t, s, fraudModel, 3, 2, at(7*time.Minute))
	wantVerifyClean(t, s)
}

func testEarlyLabelExpiry(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	ensure(t, s, ticketModel, "billing", "outage")
	ingestLabels(t, s, at(0), lab(fraudModel, "k1", "fraud", at(0)))
	ingestLabels(t, s, at(10*time.Minute),
		lab(fraudModel, "k2", "legit", at(10*time.Minute)),
		lab(ticketModel, "k3", "outage", at(10*time.Minute)),
	)
	expire := func(model string, now time.Duration, want int64) {
		t.Helper()
		n, err := s.ExpireEarlyLabels(ctx, model, time.Hour, at(now))
		if err != nil {
			t.Fatalf("ExpireEarlyLabels(%s, now %s): %v", model, now, err)
		}
		if n != want {
			t.Errorf("ExpireEarlyLabels(%s, ttl 1h, now +%s) = %d, want %d", model, now, n, want)
		}
	}
	// Received at or before now−ttl: k1 (received at +0) goes at now +1h.
	expire(fraudModel, time.Hour, 1)
	expire(fraudModel, time.Hour, 0)
	expire(ticketModel, time.Hour, 0)

	res := ingestPredictions(t, s, at(70*time.Minute),
		pred(fraudModel, "k1", at(0), "fraud", ""),
		pred(fraudModel, "k2", at(1*time.Minute), "fraud", ""),
	)
	// k1's label expired, k2's joined.
	wantChanges(t, res.Changes,
		[]store.CellDelta{cellDelta(fraudModel, at(0), "legit", "fraud", 1)},
		[]store.PredictedDelta{predDelta(fraudModel, at(0), "fraud", 2)})
	expire(fraudModel, 2*time.Hour, 0) // k2 joined: nothing is left to expire
	expire(ticketModel, 70*time.Minute, 1)
	wantTotals(t, s, fraudModel, 2, 1, at(time.Minute))
	wantVerifyClean(t, s)
}

func testLabelTimeout(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	b0, b30 := at(0), at(30*time.Minute)
	ingestPredictions(t, s, at(31*time.Minute),
		pred(fraudModel, "d1", at(0), "fraud", ""),
		pred(fraudModel, "d2", at(30*time.Minute), "fraud", ""),
		pred(fraudModel, "d3", at(1*time.Minute), "legit", ""),
		pred(fraudModel, "d4", at(2*time.Minute), "fraud", ""),
	)
	ingestLabels(t, s, at(32*time.Minute), lab(fraudModel, "d3", "fraud", at(20*time.Minute)))

	apply := func(now time.Duration, want int64, changes []store.CellDelta) {
		t.Helper()
		n, ch, err := s.ApplyLabelTimeout(ctx, fraudModel, "legit", time.Hour, at(now))
		if err != nil {
			t.Fatalf("ApplyLabelTimeout(now +%s): %v", now, err)
		}
		if n != want {
			t.Errorf("ApplyLabelTimeout(timeout 1h, now +%s) = %d, want %d", now, n, want)
		}
		wantChanges(t, ch, changes, nil)
	}
	// Due when at + timeout ≤ now: d1 at +1h exactly; d4 (+62m) and d2
	// (+90m) not yet; d3 has a real label.
	apply(time.Hour, 1, []store.CellDelta{cellDelta(fraudModel, b0, "legit", "fraud", 1)})
	apply(time.Hour, 0, nil)
	apply(62*time.Minute, 1, []store.CellDelta{cellDelta(fraudModel, b0, "legit", "fraud", 1)})

	preds := []store.PredictedCount{predicted(b0, "fraud", 2), predicted(b0, "legit", 1), predicted(b30, "fraud", 1)}
	wantCounts(t, "CountsAsOf 59m: d1's implied label is not known yet", countsAsOf(t, s, all(fraudModel), at(59*time.Minute)), store.Counts{
		Cells:     []store.Cell{cell(b0, "fraud", "legit", 1)},
		Predicted: preds,
	})
	wantCounts(t, "CountsAsOf 60m", countsAsOf(t, s, all(fraudModel), at(60*time.Minute)), store.Counts{
		Cells:     []store.Cell{cell(b0, "fraud", "legit", 1), cell(b0, "legit", "fraud", 1)},
		Predicted: preds,
	})

	// A real label after the implied one: a different class is a
	// correction; the same class only confirms it (no cell moves).
	res := ingestLabels(t, s, at(2*time.Hour),
		lab(fraudModel, "d1", "fraud", at(2*time.Hour)),
		lab(fraudModel, "d4", "legit", at(2*time.Hour)),
	)
	wantLabelOutcomes(t, res.Outcomes, store.LabelCorrected, store.LabelDuplicate)
	wantChanges(t, res.Changes, []store.CellDelta{cellDelta(fraudModel, b0, "legit", "fraud", -1), cellDelta(fraudModel, b0, "fraud", "fraud", 1)}, nil)

	// d2 is implied at +90m; a real label dated before that still wins,
	// since an implied version counts only while no real one exists.
	apply(2*time.Hour, 1, []store.CellDelta{cellDelta(fraudModel, b30, "legit", "fraud", 1)})
	res = ingestLabels(t, s, at(3*time.Hour), lab(fraudModel, "d2", "fraud", at(45*time.Minute)))
	wantLabelOutcomes(t, res.Outcomes, store.LabelCorrected)
	wantChanges(t, res.Changes, []store.CellDelta{cellDelta(fraudModel, b30, "legit", "fraud", -1), cellDelta(fraudModel, b30, "fraud", "fraud", 1)}, nil)
	apply(4*time.Hour, 0, nil)

	asOf := []struct {
		when time.Duration
		want []store.Cell
	}{
		// d1 implied legit (real at +2h not yet), d3 fraud, d4 implied
		// legit; d2 has only versions after +40m.
		{40 * time.Minute, []store.Cell{cell(b0, "fraud", "legit", 1)}},
		{90 * time.Minute, []store.Cell{cell(b0, "fraud", "legit", 1), cell(b0, "legit", "fraud", 2), cell(b30, "fraud", "fraud", 1)}},
		{5 * time.Hour, []store.Cell{cell(b0, "fraud", "fraud", 1), cell(b0, "fraud", "legit", 1), cell(b0, "legit", "fraud", 1), cell(b30, "fraud", "fraud", 1)}},
	}
	for _, a := range asOf {
		wantCounts(t, "CountsAsOf "+a.when.String(), countsAsOf(t, s, all(fraudModel), at(a.when)), store.Counts{Cells: a.want, Predicted: preds})
	}
	wantCounts(t, "Counts", counts(t, s, all(fraudModel)), store.Counts{Cells: asOf[2].want, Predicted: preds})
	wantTotals(t, s, fraudModel, 4, 4, at(30*time.Minute))
	wantVerifyClean(t, s)
}
