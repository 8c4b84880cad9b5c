package sqlitestore

import (
	"encoding/json"
	"fmt"
	"math"
	"path/filepath"
	"reflect"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// TestChunkedIngestOutcomes sends one batch long enough to be cut into
// chunks of every size (two of 100, several of 10, single lines), with
// repeats of stored predictions, repeats within the batch and lines whose
// early label waits, placed in each kind of chunk. The outcomes follow from
// how each line was built; a second store fed the same lines one call per
// line, which never takes a multi-row insert, must end with the same
// outcomes, counts and model totals.
func TestChunkedIngestOutcomes(t *testing.T) {
	ctx := t.Context()
	b := time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC)
	models := []string{"card-fraud", "loan-risk"}
	line := func(i int) store.Prediction {
		at := b.Add(time.Duration(i) * time.Second)
		p := store.Prediction{
			Model:     models[i%2],
			ID:        fmt.Sprintf("w%04d", i),
			At:        at,
			Bucket:    at.Truncate(time.Minute),
			Predicted: []string{"legit", "fraud"}[i%3%2],
			Segment:   []string{"web", "app", ""}[i%3],
		}
		if i%4 != 0 {
			p.Scores = map[string]float64{"legit": float64(i%100) / 100, "fraud": 1 - float64(i%100)/100}
		}
		return p
	}
	const n = 247 // 100 + 100 + 4×10 + 7 lines
	// Lines stored before the batch, repeated in it as they were (3, 150,
	// 215, 244) or with another class (5, 120, 225, 246).
	earlier := []int{3, 150, 215, 244, 5, 120, 225, 246}
	changed := map[int]bool{5: true, 120: true, 225: true, 246: true}
	// Lines that repeat an earlier line of the batch, as it was or with
	// another class; the repeat is the line's own id in the batch.
	repeatOf := map[int]int{30: 10, 199: 40, 212: 205, 242: 241}
	repeatChanged := map[int]bool{199: true, 242: true}
	// Lines whose label arrived first.
	earlyFor := []int{7, 130, 208, 243}

	batch := make([]store.Prediction, n)
	want := make([]store.PredictionOutcome, n)
	for i := range n {
		batch[i], want[i] = line(i), store.PredictionStored
	}
	for _, i := range earlier {
		want[i] = store.PredictionDuplicate
		if changed[i] {
			batch[i].Predicted = "refund"
			want[i] = store.PredictionConflict
		}
	}
	for i, of := range repeatOf {
		batch[i] = line(of)
		want[i] = store.PredictionDuplicate
		if repeatChanged[i] {
			batch[i].Segment = "kiosk"
			want[i] = store.PredictionConflict
		}
	}

	prepare := func(t *testing.T) *Store {
		s := openTest(t, filepath.Join(t.TempDir(), "classwatch.db"))
		for _, m := range models {
			if _, err := s.EnsureModel(ctx, m, []string{"legit", "fraud", "refund"}, 0); err != nil {
				t.Fatal(err)
			}
		}
		var pre []store.Prediction
		for _, i := range earlier {
			pre = append(pre, line(i))
		}
		if _, err := s.IngestPredictions(ctx, pre, b); err != nil {
			t.Fatal(err)
		}
		var early []store.Label
		for _, i := range earlyFor {
			early = append(early, store.Label{Model: models[i%2], ID: fmt.Sprintf("w%04d", i), Actual: "fraud", At: b})
		}
		if _, err := s.IngestLabels(ctx, early, b); err != nil {
			t.Fatal(err)
		}
		return s
	}

	chunked := prepare(t)
	res, err := chunked.IngestPredictions(ctx, batch, b.Add(time.Hour))
	if err != nil {
		t.Fatal(err)
	}
	for i := range want {
		if res.Outcomes[i] != want[i] {
			t.Errorf("line %d (%s): outcome %v, want %v", i, batch[i].ID, res.Outcomes[i], want[i])
		}
	}

	single := prepare(t)
	for i, p := range batch {
		r, err := single.IngestPredictions(ctx, []store.Prediction{p}, b.Add(time.Hour))
		if err != nil {
			t.Fatal(err)
		}
		if r.Outcomes[0] != res.Outcomes[i] {
			t.Errorf("line %d alone: outcome %v, in the batch %v", i, r.Outcomes[0], res.Outcomes[i])
		}
	}

	for _, s := range []*Store{chunked, single} {
		diffs, err := s.Verify(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if len(diffs) != 0 {
			t.Errorf("Verify = %+v, want no differences", diffs)
		}
	}
	for _, m := range models {
		q := store.Query{Model: m, From: b, To: b.Add(24 * time.Hour)}
		got, err := chunked.Counts(ctx, q)
		if err != nil {
			t.Fatal(err)
		}
		wantCounts, err := single.Counts(ctx, q)
		if err != nil {
			t.Fatal(err)
		}
		if !reflect.DeepEqual(got, wantCounts) {
			t.Errorf("%s: counts after one batch %+v, after single lines %+v", m, got, wantCounts)
		}
		if len(got.Cells) == 0 {
			t.Errorf("%s: no cells: the early labels were not joined", m)
		}
	}
	got, err := chunked.Models(ctx)
	if err != nil {
		t.Fatal(err)
	}
	wantModels, err := single.Models(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(got, wantModels) {
		t.Errorf("models after one batch %+v, after single lines %+v", got, wantModels)
	}
}

// TestAppendScoresMatchesJSON checks the hand-written score encoding
// against encoding/json (Go standard library, the encoding the stored text
// was defined by): plain and exponent notation at the switch points 1e-6
// and 1e21, negative zero, and keys that encoding/json escapes.
func TestAppendScoresMatchesJSON(t *testing.T) {
	for _, scores := range []map[string]float64{
		nil,
		{"legit": 0.97, "fraud": 0.03},
		{"a": 0, "b": math.Copysign(0, -1), "c": 1, "d": -1},
		{"tiny": 1e-6, "tinier": 9.99e-7, "sub": 5e-324, "neg": -1.5e-9},
		{"big": 1e21, "below": 9.99e20, "max": math.MaxFloat64, "round": 123456789012345680000},
		{"1/3": 1.0 / 3, "2/3": 2.0 / 3, "0.1+0.2": 0.1 + 0.2},
		{"a<b": 0.5, "r&d": 0.25, `q"uote`: 0.125, `back\slash`: 0.1, "tab\t": 0.2, "é": 0.3, "\u2028": 0.4},
	} {
		got, err := appendScores([]byte("x"), scores)
		if err != nil {
			t.Fatalf("appendScores(%v): %v", scores, err)
		}
		want := "x"
		if len(scores) > 0 {
			j, err := json.Marshal(scores)
			if err != nil {
				t.Fatal(err)
			}
			want += string(j)
		}
		if string(got) != want {
			t.Errorf("appendScores(%v) = %s, want %s", scores, got, want)
		}
	}
	for _, bad := range []float64{math.NaN(), math.Inf(1), math.Inf(-1)} {
		if _, err := appendScores(nil, map[string]float64{"legit": bad}); err == nil {
			t.Errorf("appendScores(%v) succeeded, want an error", bad)
		}
	}
}
