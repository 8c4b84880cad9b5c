package store

import (
	"cmp"
	"slices"
	"strings"
	"time"
)

// ScoreRecount holds score aggregates by group (a backend's choice: one
// group for a Query, or one per model and segment for Verify), either
// recomputed from raw rows with Add or loaded from maintained rows. Its
// maps are keyed by RecountKey: Scored by group and bucket, Hist by class
// and a bin above 0, Cal by bin.
type ScoreRecount struct {
	Scored map[RecountKey]int64
	Hist   map[RecountKey]int64
	Cal    map[RecountKey]*CalibrationSum
}

// RecountKey addresses one ScoreRecount entry; Bucket is in Unix
// microseconds.
type RecountKey struct {
	Group  string
	Bucket int64
	Class  string
	Bin    int
}

// NewScoreRecount returns an empty ScoreRecount.
func NewScoreRecount() *ScoreRecount {
	return &ScoreRecount{Scored: map[RecountKey]int64{}, Hist: map[RecountKey]int64{}, Cal: map[RecountKey]*CalibrationSum{}}
}

// Add adds one raw prediction: its bucket, predicted class and scores, and
// its current label (labeled false: none).
func (r *ScoreRecount) Add(group string, bucket time.Time, predicted string, scores map[string]float64, actual string, labeled bool) {
	t, ok := NewScoreTerms(scores, predicted)
	if !ok {
		return
	}
	b := bucket.UnixMicro()
	r.Scored[RecountKey{group, b, "", 0}]++
	for _, h := range t.Hist {
		r.Hist[RecountKey{group, b, h.Class, h.Bin}]++
	}
	if labeled {
		r.AddCal(RecountKey{group, b, "", t.Bin}, 1, t.Pred, Correct(actual, predicted), t.Brier(actual))
	}
}

// AddCal adds to the calibration entry k.
func (r *ScoreRecount) AddCal(k RecountKey, n, scoreSum, correct, brier int64) {
	e := r.Cal[k]
	if e == nil {
		e = &CalibrationSum{Bucket: time.UnixMicro(k.Bucket).UTC(), Bin: k.Bin}
		r.Cal[k] = e
	}
	e.N += n
	e.ScoreSum += scoreSum
	e.Correct += correct
	e.Brier += brier
}

// Counts returns group's aggregates as Counts carries them; classes are
// the model's classes.
func (r *ScoreRecount) Counts(group string, classes []string) ([]ScoreCount, []CalibrationCount, []BrierSum) {
	scored := map[time.Time]int64{}
	for k, n := range r.Scored {
		if k.Group == group {
			scored[time.UnixMicro(k.Bucket).UTC()] += n
		}
	}
	var hist []ScoreCount
	for k, n := range r.Hist {
		if k.Group == group {
			hist = append(hist, ScoreCount{Bucket: time.UnixMicro(k.Bucket).UTC(), Class: k.Class, Bin: k.Bin, N: n})
		}
	}
	var sums []CalibrationSum
	for k, e := range r.Cal {
		if k.Group == group {
			sums = append(sums, *e)
		}
	}
	slices.SortFunc(sums, func(x, y CalibrationSum) int { return cmp.Or(x.Bucket.Compare(y.Bucket), cmp.Compare(x.Bin, y.Bin)) })
	cal, brier := Calibration(sums)
	return ScoreHistogram(scored, hist, classes), cal, brier
}

// Differences compares maintained aggregates (stored) with recounted ones
// (r, the receiver) and returns each difference. Groups are model and
// segment joined by a NUL byte (see VerifyGroup).
func (r *ScoreRecount) Differences(stored *ScoreRecount) []Difference {
	var out []Difference
	diff := func(kind, measure string, k RecountKey, s, re int64) {
		if s == re {
			return
		}
		model, segment, _ := strings.Cut(k.Group, "\x00")
		out = append(out, Difference{Model: model, Kind: kind, Bucket: time.UnixMicro(k.Bucket).UTC(), Segment: segment,
			Class: k.Class, Bin: k.Bin, Measure: measure, Stored: s, Recounted: re})
	}
	for _, k := range unionKeys(stored.Scored, r.Scored) {
		diff("score", "n", k, stored.Scored[k], r.Scored[k])
	}
	for _, k := range unionKeys(stored.Hist, r.Hist) {
		diff("score", "n", k, stored.Hist[k], r.Hist[k])
	}
	for _, k := range unionKeys(stored.Cal, r.Cal) {
		s, re := stored.Cal[k], r.Cal[k]
		if s == nil {
			s = &CalibrationSum{}
		}
		if re == nil {
			re = &CalibrationSum{}
		}
		diff("calibration", "n", k, s.N, re.N)
		diff("calibration", "score_sum", k, s.ScoreSum, re.ScoreSum)
		diff("calibration", "correct", k, s.Correct, re.Correct)
		diff("brier", "sum", k, s.Brier, re.Brier)
	}
	return out
}

// VerifyGroup is the group key of a model and segment in Differences.
func VerifyGroup(model, segment string) string { return model + "\x00" + segment }

// unionKeys returns the keys of a and b, sorted.
func unionKeys[V any](a, b map[RecountKey]V) []RecountKey {
	var out []RecountKey
	for k := range a {
		out = append(out, k)
	}
	for k := range b {
		if _, ok := a[k]; !ok {
			out = append(out, k)
		}
	}
	slices.SortFunc(out, func(x, y RecountKey) int {
		return cmp.Or(cmp.Compare(x.Group, y.Group), cmp.Compare(x.Bucket, y.Bucket), cmp.Compare(x.Class, y.Class), cmp.Compare(x.Bin, y.Bin))
	})
	return out
}
