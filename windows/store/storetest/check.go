package storetest

import (
	"fmt"
	"maps"
	"slices"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

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

// wantRefCounts checks got against the reference's counts want, score
// aggregates included.
func wantRefCounts(t *testing.T, what string, got, want store.Counts) {
	t.Helper()
	wantCounts(t, what, got, want)
	wantScores(t, what, got, want)
}

// wantScores checks the score aggregates of got against want: counts
// exactly, and sums exactly too, since both sides convert the same whole
// number of 1e-9 units.
func wantScores(t *testing.T, what string, got, want store.Counts) {
	t.Helper()
	if !slices.EqualFunc(got.Scores, want.Scores, func(x, y store.ScoreCount) bool {
		return x.Bucket.Equal(y.Bucket) && x.Class == y.Class && x.Bin == y.Bin && x.N == y.N
	}) {
		t.Errorf("%s: score counts\n got %v\nwant %v", what, got.Scores, want.Scores)
	}
	if !slices.EqualFunc(got.Calibration, want.Calibration, func(x, y store.CalibrationCount) bool {
		return x.Bucket.Equal(y.Bucket) && x.Bin == y.Bin && x.N == y.N && x.ScoreSum == y.ScoreSum && x.Correct == y.Correct
	}) {
		t.Errorf("%s: calibration\n got %v\nwant %v", what, got.Calibration, want.Calibration)
	}
	if !slices.EqualFunc(got.Brier, want.Brier, func(x, y store.BrierSum) bool {
		return x.Bucket.Equal(y.Bucket) && x.N == y.N && x.Sum == y.Sum
	}) {
		t.Errorf("%s: Brier\n got %v\nwant %v", what, got.Brier, want.Brier)
	}
}
