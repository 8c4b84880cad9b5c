package store

import (
	"cmp"
	"math"
	"slices"
	"time"
)

// Score aggregates are kept exact: every float a prediction adds is rounded
// once, to the nearest 1e-9 (half to even), and kept as an int64 count of
// 1e-9 units, so a correction subtracts exactly what the earlier label
// added and a recount from raw rows finds exactly the maintained sums. The
// helpers below are the one definition both backends use.

// nanoUnit is the number of stored units per 1.0 of a score sum.
const nanoUnit = 1e9

// Nano returns x in 1e-9 units, rounded half to even.
func Nano(x float64) int64 { return int64(math.RoundToEven(x * nanoUnit)) }

// FromNano converts a sum in 1e-9 units back to a float64.
func FromNano(n int64) float64 { return float64(n) / nanoUnit }

// ScoreTerms are what one prediction with scores adds to the score
// aggregates.
type ScoreTerms struct {
	// Bin is the bin of the predicted class's score (0 when missing) and
	// Pred that score in 1e-9 units: the prediction's calibration entry.
	Bin  int
	Pred int64
	// Hist lists the classes whose score lies in a bin above 0, with the
	// bin; every other class counts in bin 0.
	Hist []ClassBin

	scores map[string]float64
}

// ClassBin is one class's score bin.
type ClassBin struct {
	Class string
	Bin   int
}

// NewScoreTerms returns the terms of a prediction with the given scores and
// predicted class; ok is false for a prediction without scores, which
// counts in no score aggregate.
func NewScoreTerms(scores map[string]float64, predicted string) (ScoreTerms, bool) {
	if len(scores) == 0 {
		return ScoreTerms{}, false
	}
	s := scores[predicted]
	t := ScoreTerms{Bin: ScoreBin(s), Pred: Nano(s), scores: scores}
	for c, v := range scores {
		if b := ScoreBin(v); b > 0 {
			t.Hist = append(t.Hist, ClassBin{c, b})
		}
	}
	slices.SortFunc(t.Hist, func(x, y ClassBin) int { return cmp.Compare(x.Class, y.Class) })
	return t, true
}

// Brier returns the prediction's Brier term for label actual in 1e-9
// units: Σ_k (s_k − 1[actual = k])² over its scored classes, plus 1 when
// actual has no score (a missing score counts as 0), summed in class-name
// order and rounded once.
func (t ScoreTerms) Brier(actual string) int64 {
	keys := make([]string, 0, len(t.scores))
	for k := range t.scores {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	var sum float64
	for _, k := range keys {
		d := t.scores[k]
		if k == actual {
			d--
		}
		sum += float64(d * d) // the conversion rounds the product: no fused multiply-add on any platform
	}
	if _, ok := t.scores[actual]; !ok {
		sum++
	}
	return Nano(sum)
}

// Correct returns 1 when actual is the predicted class, else 0.
func Correct(actual, predicted string) int64 {
	if actual == predicted {
		return 1
	}
	return 0
}

// ScoreHistogram completes stored score counts: hist holds, per bucket,
// the counts of bins above 0 (bin 0 entries are ignored) and scored the
// number of predictions with scores per bucket; every class of classes,
// and every class in hist, gets its bin-0 count as the bucket's scored
// predictions less its counts in the other bins. Zero counts are left out;
// the result is ordered by bucket, class and bin.
func ScoreHistogram(scored map[time.Time]int64, hist []ScoreCount, classes []string) []ScoreCount {
	type key struct {
		bucket int64
		class  string
	}
	above := map[key]int64{}
	perBucket := map[int64][]string{}
	var out []ScoreCount
	for _, h := range hist {
		if h.Bin == 0 || h.N == 0 {
			continue
		}
		out = append(out, h)
		above[key{h.Bucket.UnixNano(), h.Class}] += h.N
		perBucket[h.Bucket.UnixNano()] = append(perBucket[h.Bucket.UnixNano()], h.Class)
	}
	for b, n := range scored {
		names := append(slices.Clone(classes), perBucket[b.UnixNano()]...)
		slices.Sort(names)
		for _, c := range slices.Compact(names) {
			if zero := n - above[key{b.UnixNano(), c}]; zero != 0 {
				out = append(out, ScoreCount{Bucket: b, Class: c, Bin: 0, N: zero})
			}
		}
	}
	slices.SortFunc(out, func(x, y ScoreCount) int {
		return cmp.Or(x.Bucket.Compare(y.Bucket), cmp.Compare(x.Class, y.Class), cmp.Compare(x.Bin, y.Bin))
	})
	return out
}

// CalibrationSum is a calibration entry with its score sum in 1e-9 units,
// as backends store it.
type CalibrationSum struct {
	Bucket   time.Time
	Bin      int
	N        int64
	ScoreSum int64
	Correct  int64
	Brier    int64 // the Brier sum of the entry's predictions, 1e-9 units
}

// Calibration converts stored calibration entries (ordered by bucket, bin)
// into Counts' Calibration and Brier, leaving out empty ones.
func Calibration(sums []CalibrationSum) ([]CalibrationCount, []BrierSum) {
	var (
		cal   []CalibrationCount
		brier []BrierSum
		nanos []int64 // each Brier entry's sum in 1e-9 units
	)
	for _, s := range sums {
		if s.N == 0 && s.ScoreSum == 0 && s.Correct == 0 && s.Brier == 0 {
			continue
		}
		cal = append(cal, CalibrationCount{Bucket: s.Bucket, Bin: s.Bin, N: s.N, ScoreSum: FromNano(s.ScoreSum), Correct: s.Correct})
		if n := len(brier); n > 0 && brier[n-1].Bucket.Equal(s.Bucket) {
			brier[n-1].N += s.N
			nanos[n-1] += s.Brier
			continue
		}
		brier = append(brier, BrierSum{Bucket: s.Bucket, N: s.N})
		nanos = append(nanos, s.Brier)
	}
	for i := range brier {
		brier[i].Sum = FromNano(nanos[i])
	}
	return cal, brier
}
