package storetest

import (
	"math"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// scored returns a prediction with scores.
func scored(id string, when time.Time, predicted, segment string, scores map[string]float64) store.Prediction {
	p := pred(ticketModel, id, when, predicted, segment)
	p.Scores = scores
	return p
}

// testScores walks the score aggregates of package store through ingest, a
// join, a correction, an early label, an implied label, a duplicate, a
// segment, as-of reads, a snapshot and a purge, against values worked out
// by hand (the Brier terms below are Σ_k (s_k − 1[actual = k])² over the
// model's three classes, a missing score counting as 0).
func testScores(t *testing.T, s store.Store) {
	ensure(t, s, ticketModel, classesOf(ticketModel)...) // billing, access, outage
	b0, b1 := at(0), at(5*time.Minute)
	res := ingestPredictions(t, s, at(10*time.Minute),
		scored("s1", at(time.Minute), "billing", "web", map[string]float64{"billing": 0.7, "access": 0.2, "outage": 0.1}),
		scored("s2", at(2*time.Minute), "access", "app", map[string]float64{"access": 0.55, "billing": 0.45}),
		pred(ticketModel, "s3", at(3*time.Minute), "outage", "web"), // no scores: counts nowhere
	)
	// b0 holds two scored predictions. billing: 0.7 (bin 7), 0.45 (bin 4);
	// access: 0.2 (bin 2), 0.55 (bin 5); outage: 0.1 (bin 1: the bin's
	// lower edge), missing (bin 0).
	hist := []store.ScoreCount{
		{Bucket: b0, Class: "access", Bin: 2, N: 1}, {Bucket: b0, Class: "access", Bin: 5, N: 1},
		{Bucket: b0, Class: "billing", Bin: 4, N: 1}, {Bucket: b0, Class: "billing", Bin: 7, N: 1},
		{Bucket: b0, Class: "outage", Bin: 0, N: 1}, {Bucket: b0, Class: "outage", Bin: 1, N: 1},
	}
	wantScoreDeltas(t, "prediction batch", res.Changes.Scores, hist)
	wantScores(t, "Counts after predictions", counts(t, s, all(ticketModel)), store.Counts{Scores: hist})

	// s1 labeled billing (correct): bin 7, score 0.7, Brier 0.09+0.04+0.01
	// = 0.14. s2 labeled outage (wrong, no outage score): bin 5, score
	// 0.55, Brier 0.3025+0.2025+1 = 1.505. s3 has no scores.
	lres := ingestLabels(t, s, at(20*time.Minute),
		lab(ticketModel, "s1", "billing", at(15*time.Minute)),
		lab(ticketModel, "s2", "outage", at(15*time.Minute)),
		lab(ticketModel, "s3", "outage", at(15*time.Minute)),
	)
	first := store.Counts{Scores: hist,
		Calibration: []store.CalibrationCount{{Bucket: b0, Bin: 5, N: 1, ScoreSum: 0.55}, {Bucket: b0, Bin: 7, N: 1, ScoreSum: 0.7, Correct: 1}},
		Brier:       []store.BrierSum{{Bucket: b0, N: 2, Sum: 1.645}}}
	wantScoresNear(t, "Counts after the labels", counts(t, s, all(ticketModel)), first)
	wantCalibrationDeltas(t, "label batch", lres.Changes, first.Calibration, first.Brier)

	// Correcting s2 to access makes it correct: Brier 0.2025+0.2025 =
	// 0.405; N and the score sum stay. A repeat changes nothing.
	lres = ingestLabels(t, s, at(40*time.Minute), lab(ticketModel, "s2", "access", at(30*time.Minute)))
	wantCalibrationDeltas(t, "correction", lres.Changes,
		[]store.CalibrationCount{{Bucket: b0, Bin: 5, Correct: 1}}, []store.BrierSum{{Bucket: b0, Sum: 0.405 - 1.505}})
	lres = ingestLabels(t, s, at(41*time.Minute), lab(ticketModel, "s2", "access", at(30*time.Minute)))
	wantCalibrationDeltas(t, "duplicate", lres.Changes, nil, nil)
	corrected := first
	corrected.Calibration = []store.CalibrationCount{{Bucket: b0, Bin: 5, N: 1, ScoreSum: 0.55, Correct: 1}, {Bucket: b0, Bin: 7, N: 1, ScoreSum: 0.7, Correct: 1}}
	corrected.Brier = []store.BrierSum{{Bucket: b0, N: 2, Sum: 0.545}}
	wantScoresNear(t, "Counts after the correction", counts(t, s, all(ticketModel)), corrected)
	wantScoresNear(t, "CountsAsOf before the correction", countsAsOf(t, s, all(ticketModel), at(25*time.Minute)), first)

	testScoresLater(t, s, b0, b1)
}

// testScoresLater continues testScores with an early label, an implied
// label, a segment, a snapshot and a purge.
func testScoresLater(t *testing.T, s store.Store, b0, b1 time.Time) {
	ctx := t.Context()
	// An early label joins s4 on arrival; s5 gets the implied label
	// "billing" from the label timeout. s4: outage 0.95 (bin 9), labeled
	// outage: Brier 0.0025+0.0025 = 0.005. s5: billing 0.3 (bin 3) and
	// access 0.7, implied billing: Brier 0.49+0.49 = 0.98.
	ingestLabels(t, s, at(50*time.Minute), lab(ticketModel, "s4", "outage", at(50*time.Minute)))
	pres := ingestPredictions(t, s, at(55*time.Minute),
		scored("s4", at(6*time.Minute), "outage", "web", map[string]float64{"outage": 0.95, "access": 0.05}),
		scored("s5", at(7*time.Minute), "billing", "web", map[string]float64{"billing": 0.3, "access": 0.7}))
	wantCalibrationDeltas(t, "early label joined", pres.Changes,
		[]store.CalibrationCount{{Bucket: b1, Bin: 9, N: 1, ScoreSum: 0.95, Correct: 1}}, []store.BrierSum{{Bucket: b1, N: 1, Sum: 0.005}})
	n, ch, err := s.ApplyLabelTimeout(ctx, ticketModel, "billing", time.Hour, at(2*time.Hour))
	if err != nil || n != 1 {
		t.Fatalf("ApplyLabelTimeout = %d, %v; want 1", n, err)
	}
	wantCalibrationDeltas(t, "implied label", ch,
		[]store.CalibrationCount{{Bucket: b1, Bin: 3, N: 1, ScoreSum: 0.3, Correct: 1}}, []store.BrierSum{{Bucket: b1, N: 1, Sum: 0.98}})

	web := "web"
	q := all(ticketModel)
	q.Segment = &web
	wantScoresNear(t, "Counts of segment web", counts(t, s, q), store.Counts{
		Scores: []store.ScoreCount{
			{Bucket: b0, Class: "access", Bin: 2, N: 1}, {Bucket: b0, Class: "billing", Bin: 7, N: 1}, {Bucket: b0, Class: "outage", Bin: 1, N: 1},
			{Bucket: b1, Class: "access", Bin: 0, N: 1}, {Bucket: b1, Class: "access", Bin: 7, N: 1},
			{Bucket: b1, Class: "billing", Bin: 0, N: 1}, {Bucket: b1, Class: "billing", Bin: 3, N: 1},
			{Bucket: b1, Class: "outage", Bin: 0, N: 1}, {Bucket: b1, Class: "outage", Bin: 9, N: 1},
		},
		Calibration: []store.CalibrationCount{{Bucket: b0, Bin: 7, N: 1, ScoreSum: 0.7, Correct: 1},
			{Bucket: b1, Bin: 3, N: 1, ScoreSum: 0.3, Correct: 1}, {Bucket: b1, Bin: 9, N: 1, ScoreSum: 0.95, Correct: 1}},
		Brier: []store.BrierSum{{Bucket: b0, N: 1, Sum: 0.14}, {Bucket: b1, N: 2, Sum: 0.985}},
	})
	wantVerifyClean(t, s)
	before := counts(t, s, all(ticketModel))
	wantRefCounts(t, "CountsAsOf far future equals Counts", countsAsOf(t, s, all(ticketModel), farFuture()), before)
	err = s.Snapshot(ctx, nil, func(r store.SnapshotReader) error {
		c, err := r.Counts(ctx, all(ticketModel))
		wantRefCounts(t, "snapshot Counts", c, before)
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := s.PurgeRaw(ctx, ticketModel, at(time.Hour)); err != nil {
		t.Fatal(err)
	}
	wantRefCounts(t, "Counts after PurgeRaw", counts(t, s, all(ticketModel)), before)
	wantVerifyClean(t, s)
}

// wantScoresNear checks score aggregates with sums to within 1e-12 of the
// hand-worked decimal values.
func wantScoresNear(t *testing.T, what string, got, want store.Counts) {
	t.Helper()
	wantScores(t, what, got, store.Counts{Scores: want.Scores, Calibration: nearCal(got.Calibration, want.Calibration), Brier: nearBrier(got.Brier, want.Brier)})
}

// nearCal returns want with each score sum replaced by got's where the two
// agree to 1e-12, so that an exact comparison checks the rest.
func nearCal(got, want []store.CalibrationCount) []store.CalibrationCount {
	out := append([]store.CalibrationCount(nil), want...)
	for i := range out {
		if i < len(got) && math.Abs(got[i].ScoreSum-out[i].ScoreSum) < 1e-12 {
			out[i].ScoreSum = got[i].ScoreSum
		}
	}
	return out
}

// nearBrier is nearCal for Brier sums.
func nearBrier(got, want []store.BrierSum) []store.BrierSum {
	out := append([]store.BrierSum(nil), want...)
	for i := range out {
		if i < len(got) && math.Abs(got[i].Sum-out[i].Sum) < 1e-12 {
			out[i].Sum = got[i].Sum
		}
	}
	return out
}

// wantScoreDeltas checks a call's score histogram deltas (one model).
func wantScoreDeltas(t *testing.T, what string, got []store.ScoreDelta, want []store.ScoreCount) {
	t.Helper()
	var counts []store.ScoreCount
	for _, d := range got {
		counts = append(counts, store.ScoreCount{Bucket: d.Bucket, Class: d.Class, Bin: d.Bin, N: d.N})
	}
	wantScores(t, what+" Changes", store.Counts{Scores: counts}, store.Counts{Scores: want})
}

// wantCalibrationDeltas checks a call's calibration and Brier deltas (one
// model), sums to within 1e-12.
func wantCalibrationDeltas(t *testing.T, what string, got store.Changes, cal []store.CalibrationCount, brier []store.BrierSum) {
	t.Helper()
	var c store.Counts
	for _, d := range got.Calibration {
		c.Calibration = append(c.Calibration, store.CalibrationCount{Bucket: d.Bucket, Bin: d.Bin, N: d.N, ScoreSum: d.ScoreSum, Correct: d.Correct})
	}
	for _, d := range got.Brier {
		c.Brier = append(c.Brier, store.BrierSum{Bucket: d.Bucket, N: d.N, Sum: d.Sum})
	}
	wantScoresNear(t, what+" Changes", c, store.Counts{Calibration: cal, Brier: brier})
}
