package windows_test

import (
	"fmt"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// bucketChanges returns one bucket's changes of a model with the given
// classes as a store commits them, net per cell, bin and bucket: 40
// labeled predictions and, with scores, their score histograms (every
// class), calibration bins and Brier sum.
func bucketChanges(rng *rand.Rand, model string, classes []string, b time.Time, scores bool) store.Changes {
	var ch store.Changes
	hist := make(map[store.ScoreDelta]int64)
	calib := make(map[int]*store.CalibrationDelta)
	brier := store.BrierDelta{Model: model, Bucket: b}
	for range 40 {
		a, p := classes[rng.IntN(len(classes))], classes[rng.IntN(len(classes))]
		ch.Cells = append(ch.Cells, store.CellDelta{Model: model, Bucket: b, Actual: a, Predicted: p, N: 1})
		ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: model, Bucket: b, Predicted: p, N: 1})
		if !scores {
			continue
		}
		for _, c := range classes {
			hist[store.ScoreDelta{Model: model, Bucket: b, Class: c, Bin: rng.IntN(store.ScoreBins)}]++
		}
		s := rng.Float64()
		bin := store.ScoreBin(s)
		if calib[bin] == nil {
			calib[bin] = &store.CalibrationDelta{Model: model, Bucket: b, Bin: bin}
		}
		calib[bin].N++
		calib[bin].ScoreSum += s
		calib[bin].Correct += int64(rng.IntN(2))
		brier.N++
		brier.Sum += rng.Float64()
	}
	for d, n := range hist {
		d.N = n
		ch.Scores = append(ch.Scores, d)
	}
	for _, d := range calib {
		ch.Calibration = append(ch.Calibration, *d)
	}
	if brier.N > 0 {
		ch.Brier = append(ch.Brier, brier)
	}
	return ch
}

// BenchmarkWindowRefresh measures one step of a model's rolling windows
// (12 classes; windows 1h, 1d and 7d-matured with 7d as the reference;
// 5-minute buckets): apply the next bucket's changes, which moves the
// watermark one bucket so that every window adds and drops buckets, then
// compute every window's figures as a scrape does. "scores-off" is the
// baseline of the same run; "scores-on" adds the score aggregates and the
// early-warning figures.
func BenchmarkWindowRefresh(b *testing.B) {
	for _, scores := range []bool{false, true} {
		name := map[bool]string{false: "scores-off", true: "scores-on"}[scores]
		b.Run(name, func(b *testing.B) {
			tr, err := windows.NewTracker(windows.TrackerOptions{
				Models: []windows.ModelOptions{{Name: "support-desk", ReferenceWindow: "7d-matured", Windows: []windows.Window{
					{Name: "1h", Length: time.Hour},
					{Name: "1d", Length: 24 * time.Hour},
					{Name: "7d-matured", Length: 7 * 24 * time.Hour, Lag: 3 * 24 * time.Hour},
				}}},
			})
			if err != nil {
				b.Fatal(err)
			}
			classes := make([]string, 12)
			for i := range classes {
				classes[i] = fmt.Sprintf("queue-%02d", i)
			}
			tr.SetClasses("support-desk", classes)
			rng := rand.New(rand.NewPCG(5, 8))
			at := t0
			step := func() {
				tr.Apply(bucketChanges(rng, "support-desk", classes, at, scores), map[string]time.Time{"support-desk": at})
				at = at.Add(5 * time.Minute)
			}
			for range 10 * 24 * 12 { // ten days of buckets: every window full
				step()
			}
			for b.Loop() {
				b.StopTimer() // the next bucket's changes are input, not work
				ch := bucketChanges(rng, "support-desk", classes, at, scores)
				b.StartTimer()
				tr.Apply(ch, map[string]time.Time{"support-desk": at})
				at = at.Add(5 * time.Minute)
				for _, v := range tr.Views("support-desk") {
					_ = v.Metrics(0.95)
				}
			}
		})
	}
}
