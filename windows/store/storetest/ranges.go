package storetest

import (
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

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
