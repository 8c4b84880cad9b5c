// Package storetest is the conformance suite of the store.Store seam. Each
// backend calls Exercise from its own tests, so both backends are held to
// the one set of semantics documented in package store.
//
// The suite checks explicit values worked out by hand for every row of the
// join's semantics, and compares random histories against an in-memory
// reference model (reference.go) written straight from store's
// documentation. Where store's documentation leaves a choice open, the
// suite fixes it, and the choice is stated beside the check:
//
//   - a repeat of an early label version still waiting is LabelDuplicate;
//   - a real label equal to an implied one is LabelDuplicate (the current
//     label's class is unchanged, no cell moves); a different one is
//     LabelCorrected;
//   - Counts and CountsAsOf leave out zero counts, order cells by bucket,
//     actual, predicted and predicted counts by bucket, predicted (byte
//     order of the names);
//   - CountsAsOf leaves out predictions whose at is after asOf;
//   - Changes list each cell or predicted count at most once, never with a
//     zero N, in any order;
//   - ingest, reads and maintenance of an unregistered model fail with
//     store.ErrUnknownModel and keep nothing;
//   - after PurgeRaw, Models counts only the predictions still stored,
//     Verify skips the purged buckets, and a label for a purged prediction
//     waits as an early label.
//
// All times are whole seconds in UTC, well inside any backend's precision.
package storetest

import (
	"bytes"
	"errors"
	"fmt"
	"maps"
	"slices"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// Exercise runs the conformance suite. newStore must return a fresh,
// migrated, empty store for each call (its own file or schema) and arrange
// its cleanup with t.Cleanup.
func Exercise(t *testing.T, newStore func(t *testing.T) store.Store) {
	t.Run("MigrateAndPing", func(t *testing.T) { testMigrateAndPing(t, newStore(t)) })
	t.Run("EnsureModel", func(t *testing.T) { testEnsureModel(t, newStore(t)) })
	t.Run("UnknownModel", func(t *testing.T) { testUnknownModel(t, newStore(t)) })
	t.Run("Predictions", func(t *testing.T) { testPredictions(t, newStore(t)) })
	t.Run("Labels", func(t *testing.T) { testLabels(t, newStore(t)) })
	t.Run("EarlyLabels", func(t *testing.T) { testEarlyLabels(t, newStore(t)) })
	t.Run("EarlyLabelExpiry", func(t *testing.T) { testEarlyLabelExpiry(t, newStore(t)) })
	t.Run("LabelTimeout", func(t *testing.T) { testLabelTimeout(t, newStore(t)) })
	t.Run("SegmentsAndRanges", func(t *testing.T) { testSegmentsAndRanges(t, newStore(t)) })
	t.Run("PurgeRaw", func(t *testing.T) { testPurgeRaw(t, newStore(t)) })
	t.Run("Alerts", func(t *testing.T) { testAlerts(t, newStore(t)) })
	t.Run("TryLead", func(t *testing.T) { testTryLead(t, newStore(t)) })
	t.Run("Snapshot", func(t *testing.T) { testSnapshot(t, newStore(t)) })
	t.Run("ConcurrentIngest", func(t *testing.T) { testConcurrentIngest(t, newStore(t)) })
	t.Run("ConcurrentJoin", func(t *testing.T) { testConcurrentJoin(t, newStore(t)) })
	t.Run("OrderIndependence", func(t *testing.T) { testOrderIndependence(t, newStore) })
	t.Run("ReferenceHistory", func(t *testing.T) { testReferenceHistory(t, newStore) })
}

// bucketWidth is the bucket every test uses (the configured default).
const bucketWidth = 5 * time.Minute

// The two fictional models of the suite: a card-fraud screen of a small
// bank and a support desk's ticket router.
const (
	fraudModel  = "card-fraud"
	ticketModel = "ticket-router"
)

// base is the suite's time origin.
func base() time.Time { return time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC) }

// at returns base + d.
func at(d time.Duration) time.Time { return base().Add(d) }

// farFuture is an as-of time after every event of the suite.
func farFuture() time.Time { return time.Date(2100, 1, 1, 0, 0, 0, 0, time.UTC) }

func pred(model, id string, when time.Time, predicted, segment string) store.Prediction {
	return store.Prediction{Model: model, ID: id, At: when, Bucket: when.Truncate(bucketWidth), Predicted: predicted, Segment: segment}
}

func lab(model, id, actual string, when time.Time) store.Label {
	return store.Label{Model: model, ID: id, Actual: actual, At: when}
}

func cell(bucket time.Time, actual, predicted string, n int64) store.Cell {
	return store.Cell{Bucket: bucket, Actual: actual, Predicted: predicted, N: n}
}

func predicted(bucket time.Time, class string, n int64) store.PredictedCount {
	return store.PredictedCount{Bucket: bucket, Predicted: class, N: n}
}

func cellDelta(model string, bucket time.Time, actual, predicted string, n int64) store.CellDelta {
	return store.CellDelta{Model: model, Bucket: bucket, Actual: actual, Predicted: predicted, N: n}
}

func predDelta(model string, bucket time.Time, class string, n int64) store.PredictedDelta {
	return store.PredictedDelta{Model: model, Bucket: bucket, Predicted: class, N: n}
}

// all selects every bucket of model.
func all(model string) store.Query {
	return store.Query{Model: model, From: time.Date(2000, 1, 1, 0, 0, 0, 0, time.UTC), To: farFuture()}
}

func ensure(t *testing.T, s store.Store, model string, classes ...string) {
	t.Helper()
	if _, err := s.EnsureModel(t.Context(), model, classes, 0); err != nil {
		t.Fatalf("EnsureModel(%s): %v", model, err)
	}
}

func ingestPredictions(t *testing.T, s store.Store, now time.Time, batch ...store.Prediction) store.PredictionResult {
	t.Helper()
	res, err := s.IngestPredictions(t.Context(), batch, now)
	if err != nil {
		t.Fatalf("IngestPredictions: %v", err)
	}
	if len(res.Outcomes) != len(batch) {
		t.Fatalf("IngestPredictions gave %d outcomes for %d lines", len(res.Outcomes), len(batch))
	}
	return res
}

func ingestLabels(t *testing.T, s store.Store, now time.Time, batch ...store.Label) store.LabelResult {
	t.Helper()
	res, err := s.IngestLabels(t.Context(), batch, now)
	if err != nil {
		t.Fatalf("IngestLabels: %v", err)
	}
	if len(res.Outcomes) != len(batch) {
		t.Fatalf("IngestLabels gave %d outcomes for %d lines", len(res.Outcomes), len(batch))
	}
	return res
}

func predictionOutcomeName(o store.PredictionOutcome) string {
	switch o {
	case store.PredictionStored:
		return "stored"
	case store.PredictionDuplicate:
		return "duplicate"
	case store.PredictionConflict:
		return "conflict"
	}
	return fmt.Sprintf("PredictionOutcome(%d)", int(o))
}

func wantPredictionOutcomes(t *testing.T, got []store.PredictionOutcome, want ...store.PredictionOutcome) {
	t.Helper()
	if !slices.Equal(got, want) {
		var g, w []string
		for _, o := range got {
			g = append(g, predictionOutcomeName(o))
		}
		for _, o := range want {
			w = append(w, predictionOutcomeName(o))
		}
		t.Errorf("prediction outcomes = %v, want %v", g, w)
	}
}

func wantLabelOutcomes(t *testing.T, got []store.LabelOutcome, want ...store.LabelOutcome) {
	t.Helper()
	if !slices.Equal(got, want) {
		t.Errorf("label outcomes = %v, want %v", got, want)
	}
}

// changeMaps turns Changes into maps, reporting a key listed twice or a
// zero N, which "net deltas" excludes.
func changeMaps(t *testing.T, c store.Changes) (map[changeCell]int64, map[changePred]int64) {
	t.Helper()
	cells, pred := map[changeCell]int64{}, map[changePred]int64{}
	for _, d := range c.Cells {
		k := changeCell{d.Model, d.Bucket.UnixMicro(), d.Actual, d.Predicted}
		if _, dup := cells[k]; dup {
			t.Errorf("Changes list cell %+v twice", d)
		}
		if d.N == 0 {
			t.Errorf("Changes list cell %+v with N 0", d)
		}
		cells[k] += d.N
	}
	for _, d := range c.Predicted {
		k := changePred{d.Model, d.Bucket.UnixMicro(), d.Predicted}
		if _, dup := pred[k]; dup {
			t.Errorf("Changes list predicted count %+v twice", d)
		}
		if d.N == 0 {
			t.Errorf("Changes list predicted count %+v with N 0", d)
		}
		pred[k] += d.N
	}
	return cells, pred
}

// wantChanges checks c against the listed deltas, in any order.
func wantChanges(t *testing.T, c store.Changes, cells []store.CellDelta, preds []store.PredictedDelta) {
	t.Helper()
	want := tally{cells: map[changeCell]int64{}, pred: map[changePred]int64{}}
	for _, d := range cells {
		want.cells[changeCell{d.Model, d.Bucket.UnixMicro(), d.Actual, d.Predicted}] += d.N
	}
	for _, d := range preds {
		want.pred[changePred{d.Model, d.Bucket.UnixMicro(), d.Predicted}] += d.N
	}
	compareChanges(t, c, want)
}

func compareChanges(t *testing.T, c store.Changes, want tally) {
	t.Helper()
	gotCells, gotPred := changeMaps(t, c)
	if !maps.Equal(gotCells, want.cells) {
		t.Errorf("cell changes = %s, want %s", formatCellMap(gotCells), formatCellMap(want.cells))
	}
	if !maps.Equal(gotPred, want.pred) {
		t.Errorf("predicted changes = %s, want %s", formatPredMap(gotPred), formatPredMap(want.pred))
	}
}

func formatCellMap(m map[changeCell]int64) string {
	var parts []string
	for k, n := range m {
		parts = append(parts, fmt.Sprintf("%s/%s/%s/%s:%+d", k.model, time.UnixMicro(k.bucket).UTC().Format(time.RFC3339), k.actual, k.predicted, n))
	}
	sort.Strings(parts)
	return "[" + strings.Join(parts, " ") + "]"
}

func formatPredMap(m map[changePred]int64) string {
	var parts []string
	for k, n := range m {
		parts = append(parts, fmt.Sprintf("%s/%s/%s:%+d", k.model, time.UnixMicro(k.bucket).UTC().Format(time.RFC3339), k.predicted, n))
	}
	sort.Strings(parts)
	return "[" + strings.Join(parts, " ") + "]"
}

func counts(t *testing.T, s store.Store, q store.Query) store.Counts {
	t.Helper()
	c, err := s.Counts(t.Context(), q)
	if err != nil {
		t.Fatalf("Counts(%s): %v", q.Model, err)
	}
	return c
}

func countsAsOf(t *testing.T, s store.Store, q store.Query, asOf time.Time) store.Counts {
	t.Helper()
	c, err := s.CountsAsOf(t.Context(), q, asOf)
	if err != nil {
		t.Fatalf("CountsAsOf(%s, %s): %v", q.Model, asOf.Format(time.RFC3339), err)
	}
	return c
}

func formatCounts(c store.Counts) string {
	var b strings.Builder
	b.WriteString("cells[")
	for i, x := range c.Cells {
		if i > 0 {
			b.WriteString(" ")
		}
		fmt.Fprintf(&b, "%s/%s/%s:%d", x.Bucket.UTC().Format("15:04"), x.Actual, x.Predicted, x.N)
	}
	b.WriteString("] predicted[")
	for i, x := range c.Predicted {
		if i > 0 {
			b.WriteString(" ")
		}
		fmt.Fprintf(&b, "%s/%s:%d", x.Bucket.UTC().Format("15:04"), x.Predicted, x.N)
	}
	b.WriteString("]")
	return b.String()
}

// equalCounts compares in order; times by instant.
func equalCounts(a, b store.Counts) bool {
	return slices.EqualFunc(a.Cells, b.Cells, func(x, y store.Cell) bool {
		return x.Bucket.Equal(y.Bucket) && x.Actual == y.Actual && x.Predicted == y.Predicted && x.N == y.N
	}) && slices.EqualFunc(a.Predicted, b.Predicted, func(x, y store.PredictedCount) bool {
		return x.Bucket.Equal(y.Bucket) && x.Predicted == y.Predicted && x.N == y.N
	})
}

func wantCounts(t *testing.T, what string, got, want store.Counts) {
	t.Helper()
	if !equalCounts(got, want) {
		t.Errorf("%s:\n got  %s\n want %s", what, formatCounts(got), formatCounts(want))
	}
}

func wantVerifyClean(t *testing.T, s store.Store) {
	t.Helper()
	diffs, err := s.Verify(t.Context())
	if err != nil {
		t.Fatalf("Verify: %v", err)
	}
	for _, d := range diffs {
		t.Errorf("Verify: %+v", d)
	}
}

func modelInfo(t *testing.T, s store.Store, model string) store.ModelInfo {
	t.Helper()
	ms, err := s.Models(t.Context())
	if err != nil {
		t.Fatalf("Models: %v", err)
	}
	for _, m := range ms {
		if m.Name == model {
			return m
		}
	}
	t.Fatalf("Models does not list %s", model)
	return store.ModelInfo{}
}

func wantTotals(t *testing.T, s store.Store, model string, preds, labeled int64, latest time.Time) {
	t.Helper()
	m := modelInfo(t, s, model)
	if m.Predictions != preds || m.Labeled != labeled || !m.LatestAt.Equal(latest) {
		t.Errorf("Models %s: predictions %d, labeled %d, latest %s; want %d, %d, %s",
			model, m.Predictions, m.Labeled, m.LatestAt.Format(time.RFC3339), preds, labeled, latest.Format(time.RFC3339))
	}
}

func testMigrateAndPing(t *testing.T, s store.Store) {
	ctx := t.Context()
	if err := s.Ping(ctx); err != nil {
		t.Fatalf("Ping on a migrated store: %v", err)
	}
	if err := s.Migrate(ctx); err != nil {
		t.Fatalf("second Migrate: %v", err)
	}
	if err := s.Ping(ctx); err != nil {
		t.Fatalf("Ping after a second Migrate: %v", err)
	}
	ms, err := s.Models(ctx)
	if err != nil {
		t.Fatalf("Models: %v", err)
	}
	if len(ms) != 0 {
		t.Errorf("a fresh store lists %d models, want 0", len(ms))
	}
}

func testEnsureModel(t *testing.T, s store.Store) {
	ctx := t.Context()
	steps := []struct {
		name    string
		model   string
		classes []string
		max     int
		want    []string // nil with tooMany
		tooMany bool
	}{
		{"new model keeps the order given", ticketModel, []string{"billing", "access"}, 0, []string{"billing", "access"}, false},
		{"new classes are appended once each", ticketModel, []string{"access", "outage", "outage", "refund"}, 0, []string{"billing", "access", "outage", "refund"}, false},
		{"passing the cap registers nothing", ticketModel, []string{"hardware", "shipping"}, 5, nil, true},
		{"reaching the cap exactly is allowed", ticketModel, []string{"hardware"}, 5, []string{"billing", "access", "outage", "refund", "hardware"}, false},
		{"known classes under a lower cap", ticketModel, []string{"billing"}, 2, []string{"billing", "access", "outage", "refund", "hardware"}, false},
		{"no classes returns the list", ticketModel, nil, 0, []string{"billing", "access", "outage", "refund", "hardware"}, false},
		{"a new model past the cap is not registered", fraudModel, []string{"legit", "fraud", "unknown"}, 2, nil, true},
		{"a second model is separate", fraudModel, []string{"legit", "fraud"}, 2, []string{"legit", "fraud"}, false},
	}
	for _, st := range steps {
		got, err := s.EnsureModel(ctx, st.model, st.classes, st.max)
		if st.tooMany {
			if !errors.Is(err, store.ErrTooManyClasses) {
				t.Errorf("%s: error %v, want ErrTooManyClasses", st.name, err)
			}
			if st.model == fraudModel {
				// Nothing registered: the model is still unknown.
				if _, err := s.Counts(ctx, all(fraudModel)); !errors.Is(err, store.ErrUnknownModel) {
					t.Errorf("%s: Counts error %v, want ErrUnknownModel", st.name, err)
				}
			}
			continue
		}
		if err != nil {
			t.Fatalf("%s: %v", st.name, err)
		}
		if !slices.Equal(got, st.want) {
			t.Errorf("%s: classes %q, want %q", st.name, got, st.want)
		}
	}
	ms, err := s.Models(ctx)
	if err != nil {
		t.Fatalf("Models: %v", err)
	}
	slices.SortFunc(ms, func(a, b store.ModelInfo) int { return strings.Compare(a.Name, b.Name) })
	if len(ms) != 2 {
		t.Fatalf("Models lists %d models, want 2", len(ms))
	}
	wantModels := []store.ModelInfo{
		{Name: fraudModel, Classes: []string{"legit", "fraud"}},
		{Name: ticketModel, Classes: []string{"billing", "access", "outage", "refund", "hardware"}},
	}
	for i, w := range wantModels {
		g := ms[i]
		if g.Name != w.Name || !slices.Equal(g.Classes, w.Classes) || g.Predictions != 0 || g.Labeled != 0 || !g.LatestAt.IsZero() {
			t.Errorf("Models[%d] = %+v, want %+v", i, g, w)
		}
	}
}

func testUnknownModel(t *testing.T, s store.Store) {
	ctx := t.Context()
	ensure(t, s, fraudModel, "legit", "fraud")
	now := at(time.Hour)
	checks := map[string]error{}
	_, checks["Counts"] = s.Counts(ctx, all("no-such-model"))
	_, checks["CountsAsOf"] = s.CountsAsOf(ctx, all("no-such-model"), now)
	_, _, checks["ApplyLabelTimeout"] = s.ApplyLabelTimeout(ctx, "no-such-model", "legit", time.Hour, now)
	_, checks["ExpireEarlyLabels"] = s.ExpireEarlyLabels(ctx, "no-such-model", time.Hour, now)
	_, checks["PurgeRaw"] = s.PurgeRaw(ctx, "no-such-model", now)
	// A batch with one unregistered line is refused whole.
	_, checks["IngestPredictions"] = s.IngestPredictions(ctx, []store.Prediction{
		pred(fraudModel, "t1", at(0), "fraud", ""),
		pred("no-such-model", "t2", at(0), "fraud", ""),
	}, now)
	_, checks["IngestLabels"] = s.IngestLabels(ctx, []store.Label{
		lab(fraudModel, "t1", "fraud", at(0)),
		lab("no-such-model", "t2", "fraud", at(0)),
	}, now)
	for name, err := range checks {
		if !errors.Is(err, store.ErrUnknownModel) {
			t.Errorf("%s on an unknown model: error %v, want ErrUnknownModel", name, err)
		}
		if errors.Is(err, store.ErrUnavailable) {
			t.Errorf("%s on an unknown model: error %v claims the store is unavailable", name, err)
		}
	}
	wantCounts(t, "Counts after refused batches", counts(t, s, all(fraudModel)), store.Counts{})
	wantTotals(t, s, fraudModel, 0, 0, time.Time{})
	// The refused label batch kept no early label either: t1's prediction
	// arrives unlabeled.
	res := ingestPredictions(t, s, now, pred(fraudModel, "t1", at(0), "fraud", ""))
	wantChanges(t, res.Changes, nil, []store.PredictedDelta{predDelta(fraudModel, at(0), "fraud", 1)})
}

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

func testSegmentsAndRanges(t *testing.T, s store.Store) {
	ensure(t, s, fraudModel, "legit", "fraud")
	b0, b1 := at(0), at(5*time.Minute)
	ingestPredictions(t, s, at(10*time.Minute),
		pred(fraudModel, "s1", at(0), "fraud", "web"),
		pred(fraudModel, "s2", at(1*time.Minute), "fraud", "app"),
		pred(fraudModel, "s3", at(2*time.Minute), "legit", ""),
		pred(fraudModel, "s4", at(3*time.Minute), "fraud", "web"),
		pred(fraudModel, "s5", at(5*time.Minute), "fraud", "web"),
	)
	res := ingestLabels(t, s, at(20*time.Minute),
		lab(fraudModel, "s1", "fraud", at(20*time.Minute)),
		lab(fraudModel, "s2", "fraud", at(20*time.Minute)),
		lab(fraudModel, "s3", "legit", at(20*time.Minute)),
		lab(fraudModel, "s4", "legit", at(20*time.Minute)),
		lab(fraudModel, "s5", "legit", at(20*time.Minute)),
	)
	// s1 and s2 share a cell across segments: one delta of 2.
	wantChanges(t, res.Changes, []store.CellDelta{
		cellDelta(fraudModel, b0, "fraud", "fraud", 2),
		cellDelta(fraudModel, b0, "legit", "fraud", 1),
		cellDelta(fraudModel, b0, "legit", "legit", 1),
		cellDelta(fraudModel, b1, "legit", "fraud", 1),
	}, nil)

	web, none, unknown := "web", "", "kiosk"
	cases := []struct {
		name     string
		from, to time.Time
		segment  *string
		want     store.Counts
	}{
		{"all segments", b0, at(time.Hour), nil, store.Counts{
			Cells:     []store.Cell{cell(b0, "fraud", "fraud", 2), cell(b0, "legit", "fraud", 1), cell(b0, "legit", "legit", 1), cell(b1, "legit", "fraud", 1)},
			Predicted: []store.PredictedCount{predicted(b0, "fraud", 3), predicted(b0, "legit", 1), predicted(b1, "fraud", 1)},
		}},
		{"segment web", b0, at(time.Hour), &web, store.Counts{
			Cells:     []store.Cell{cell(b0, "fraud", "fraud", 1), cell(b0, "legit", "fraud", 1), cell(b1, "legit", "fraud", 1)},
			Predicted: []store.PredictedCount{predicted(b0, "fraud", 2), predicted(b1, "fraud", 1)},
		}},
		{"empty segment", b0, at(time.Hour), &none, store.Counts{
			Cells:     []store.Cell{cell(b0, "legit", "legit", 1)},
			Predicted: []store.PredictedCount{predicted(b0, "legit", 1)},
		}},
		{"segment never seen", b0, at(time.Hour), &unknown, store.Counts{}},
		{"To excludes its bucket", b0, b1, &web, store.Counts{
			Cells:     []store.Cell{cell(b0, "fraud", "fraud", 1), cell(b0, "legit", "fraud", 1)},
			Predicted: []store.PredictedCount{predicted(b0, "fraud", 2)},
		}},
		{"From includes its bucket", b1, at(10 * time.Minute), nil, store.Counts{
			Cells:     []store.Cell{cell(b1, "legit", "fraud", 1)},
			Predicted: []store.PredictedCount{predicted(b1, "fraud", 1)},
		}},
		{"empty range", b1, b1, nil, store.Counts{}},
	}
	for _, c := range cases {
		q := store.Query{Model: fraudModel, From: c.from, To: c.to, Segment: c.segment}
		wantCounts(t, "Counts "+c.name, counts(t, s, q), c.want)
		wantCounts(t, "CountsAsOf far future "+c.name, countsAsOf(t, s, q, farFuture()), c.want)
	}
	wantVerifyClean(t, s)
}

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

func testAlerts(t *testing.T, s store.Store) {
	ctx := t.Context()
	rec := func(key, state string, updated time.Duration, data string) store.AlertRecord {
		return store.AlertRecord{Key: key, Rule: "recall-drop", Model: fraudModel, Class: strings.TrimPrefix(key, "recall-drop/card-fraud/"),
			State: state, Data: []byte(data), UpdatedAt: at(updated)}
	}
	fraudFiring := rec("recall-drop/card-fraud/fraud", "firing", 0, `{"recall":0.61}`)
	fraudResolved := rec("recall-drop/card-fraud/fraud", "resolved", time.Hour, `{"recall":0.83}`)
	legitPending := rec("recall-drop/card-fraud/legit", "pending", 30*time.Minute, `{"recall":0.97}`)
	fraudQuiet := rec("recall-drop/card-fraud/fraud", "resolved", 2*time.Hour, `{"recall":0.85}`)
	for _, step := range []struct {
		rec     store.AlertRecord
		history bool
	}{{fraudFiring, true}, {fraudResolved, true}, {legitPending, false}, {fraudQuiet, false}} {
		if err := s.SaveAlert(ctx, step.rec, step.history); err != nil {
			t.Fatalf("SaveAlert(%s): %v", step.rec.Key, err)
		}
	}
	got, err := s.Alerts(ctx)
	if err != nil {
		t.Fatalf("Alerts: %v", err)
	}
	slices.SortFunc(got, func(a, b store.AlertRecord) int { return strings.Compare(a.Key, b.Key) })
	wantRecords(t, "Alerts", got, []store.AlertRecord{fraudQuiet, legitPending})

	history := []struct {
		name     string
		from, to time.Duration
		limit    int
		want     []store.AlertRecord
	}{
		{"newest first", 0, 3 * time.Hour, 0, []store.AlertRecord{fraudResolved, fraudFiring}},
		{"to is exclusive", 0, time.Hour, 0, []store.AlertRecord{fraudFiring}},
		{"from is inclusive", time.Hour, 3 * time.Hour, 0, []store.AlertRecord{fraudResolved}},
		{"limit keeps the newest", 0, 3 * time.Hour, 1, []store.AlertRecord{fraudResolved}},
		{"empty range", 2 * time.Hour, 3 * time.Hour, 0, nil},
	}
	for _, h := range history {
		got, err := s.AlertHistory(ctx, at(h.from), at(h.to), h.limit)
		if err != nil {
			t.Fatalf("AlertHistory %s: %v", h.name, err)
		}
		wantRecords(t, "AlertHistory "+h.name, got, h.want)
	}
}

func wantRecords(t *testing.T, what string, got, want []store.AlertRecord) {
	t.Helper()
	same := slices.EqualFunc(got, want, func(a, b store.AlertRecord) bool {
		return a.Key == b.Key && a.Rule == b.Rule && a.Model == b.Model && a.Class == b.Class &&
			a.State == b.State && bytes.Equal(a.Data, b.Data) && a.UpdatedAt.Equal(b.UpdatedAt)
	})
	if !same {
		t.Errorf("%s:\n got  %s\n want %s", what, formatRecords(got), formatRecords(want))
	}
}

func formatRecords(rs []store.AlertRecord) string {
	var parts []string
	for _, r := range rs {
		parts = append(parts, fmt.Sprintf("{%s %s %s %s %s %s}", r.Key, r.Rule, r.Class, r.State, r.Data, r.UpdatedAt.UTC().Format(time.RFC3339)))
	}
	return "[" + strings.Join(parts, " ") + "]"
}

func testTryLead(t *testing.T, s store.Store) {
	ctx := t.Context()
	first, err := s.TryLead(ctx, "alert-evaluator")
	if err != nil || first == nil {
		t.Fatalf("TryLead on a free lock = %v, %v; want a lease", first, err)
	}
	if err := first.Alive(ctx); err != nil {
		t.Errorf("Alive of a held lease: %v", err)
	}
	second, err := s.TryLead(ctx, "alert-evaluator")
	if err != nil || second != nil {
		t.Errorf("TryLead while held = %v, %v; want nil, nil", second, err)
	}
	other, err := s.TryLead(ctx, "retention")
	if err != nil || other == nil {
		t.Fatalf("TryLead on another name = %v, %v; want a lease", other, err)
	}
	if err := first.Release(ctx); err != nil {
		t.Fatalf("Release: %v", err)
	}
	if err := first.Alive(ctx); err == nil {
		t.Errorf("Alive after Release = nil, want an error")
	}
	if err := first.Release(ctx); err != nil {
		t.Errorf("second Release: %v", err)
	}
	third, err := s.TryLead(ctx, "alert-evaluator")
	if err != nil || third == nil {
		t.Fatalf("TryLead after Release = %v, %v; want a lease", third, err)
	}
	if err := other.Alive(ctx); err != nil {
		t.Errorf("Alive of the other lease: %v", err)
	}
	if err := errors.Join(third.Release(ctx), other.Release(ctx)); err != nil {
		t.Errorf("Release: %v", err)
	}
}
