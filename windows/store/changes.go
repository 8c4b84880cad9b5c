package store

import (
	"cmp"
	"slices"
	"time"
)

// ChangeSet sums per-segment increments into a call's net Changes. Backends
// add every cell and predicted-count increment of a transaction, then call
// Changes once it committed. The zero value is ready to use; a ChangeSet
// is not safe for concurrent use.
type ChangeSet struct {
	cells     map[cellDeltaKey]int64
	predicted map[predictedDeltaKey]int64
	scored    map[modelBucket]int64
	hist      map[histKey]int64
	cal       map[calKey]*CalibrationSum
	classes   map[string][]string
}

type modelBucket struct {
	model  string
	bucket int64
}

type histKey struct {
	modelBucket
	class string
	bin   int
}

type calKey struct {
	modelBucket
	bin int
}

type cellDeltaKey struct {
	model             string
	bucket            int64 // Unix nanoseconds, so equal instants are equal keys
	actual, predicted string
}

type predictedDeltaKey struct {
	model     string
	bucket    int64
	predicted string
}

// AddCell adds n to cell (model, bucket, actual, predicted).
func (c *ChangeSet) AddCell(model string, bucket time.Time, actual, predicted string, n int64) {
	if c.cells == nil {
		c.cells = map[cellDeltaKey]int64{}
	}
	c.cells[cellDeltaKey{model, bucket.UnixNano(), actual, predicted}] += n
}

// AddPredicted adds n to the predicted count (model, bucket, predicted).
func (c *ChangeSet) AddPredicted(model string, bucket time.Time, predicted string, n int64) {
	if c.predicted == nil {
		c.predicted = map[predictedDeltaKey]int64{}
	}
	c.predicted[predictedDeltaKey{model, bucket.UnixNano(), predicted}] += n
}

// AddScored adds n predictions with scores to (model, bucket): each class
// of the model counts them in bin 0 unless AddScore moves them to another
// bin. classes are the model's classes.
func (c *ChangeSet) AddScored(model string, bucket time.Time, classes []string, n int64) {
	if c.scored == nil {
		c.scored, c.hist, c.classes = map[modelBucket]int64{}, map[histKey]int64{}, map[string][]string{}
	}
	c.scored[modelBucket{model, bucket.UnixNano()}] += n
	c.classes[model] = classes
}

// AddScore adds n predictions whose score for class lies in bin (above 0)
// to (model, bucket); they must also be added with AddScored.
func (c *ChangeSet) AddScore(model string, bucket time.Time, class string, bin int, n int64) {
	if c.scored == nil {
		c.scored, c.hist, c.classes = map[modelBucket]int64{}, map[histKey]int64{}, map[string][]string{}
	}
	c.hist[histKey{modelBucket{model, bucket.UnixNano()}, class, bin}] += n
}

// AddCalibration adds a labeled prediction's calibration and Brier entry
// (or, with negative N and sums, takes one away): n predictions, their
// predicted-class score sum, correct count and Brier sum, the sums in 1e-9
// units.
func (c *ChangeSet) AddCalibration(model string, bucket time.Time, bin int, n, scoreSum, correct, brier int64) {
	if c.cal == nil {
		c.cal = map[calKey]*CalibrationSum{}
	}
	k := calKey{modelBucket{model, bucket.UnixNano()}, bin}
	e := c.cal[k]
	if e == nil {
		e = &CalibrationSum{Bucket: bucket.UTC(), Bin: bin}
		c.cal[k] = e
	}
	e.N += n
	e.ScoreSum += scoreSum
	e.Correct += correct
	e.Brier += brier
}

// Changes returns the net deltas, leaving out those that cancelled, ordered
// by model, bucket and class names.
func (c *ChangeSet) Changes() Changes {
	var out Changes
	out.Scores = c.scoreDeltas()
	out.Calibration, out.Brier = c.calibrationDeltas()
	for k, n := range c.cells {
		if n != 0 {
			out.Cells = append(out.Cells, CellDelta{Model: k.model, Bucket: time.Unix(0, k.bucket).UTC(), Actual: k.actual, Predicted: k.predicted, N: n})
		}
	}
	for k, n := range c.predicted {
		if n != 0 {
			out.Predicted = append(out.Predicted, PredictedDelta{Model: k.model, Bucket: time.Unix(0, k.bucket).UTC(), Predicted: k.predicted, N: n})
		}
	}
	slices.SortFunc(out.Cells, func(x, y CellDelta) int {
		return cmp.Or(cmp.Compare(x.Model, y.Model), x.Bucket.Compare(y.Bucket), cmp.Compare(x.Actual, y.Actual), cmp.Compare(x.Predicted, y.Predicted))
	})
	slices.SortFunc(out.Predicted, func(x, y PredictedDelta) int {
		return cmp.Or(cmp.Compare(x.Model, y.Model), x.Bucket.Compare(y.Bucket), cmp.Compare(x.Predicted, y.Predicted))
	})
	return out
}

// scoreDeltas returns the net score histogram deltas, bin 0 of each class
// included, ordered by model, bucket, class and bin.
func (c *ChangeSet) scoreDeltas() []ScoreDelta {
	models := map[string]bool{}
	for mb := range c.scored {
		models[mb.model] = true
	}
	for k := range c.hist {
		models[k.model] = true
	}
	var out []ScoreDelta
	for model := range models {
		scored := map[time.Time]int64{}
		for mb, n := range c.scored {
			if mb.model == model {
				scored[time.Unix(0, mb.bucket).UTC()] = n
			}
		}
		var hist []ScoreCount
		for k, n := range c.hist {
			if k.model == model {
				hist = append(hist, ScoreCount{Bucket: time.Unix(0, k.bucket).UTC(), Class: k.class, Bin: k.bin, N: n})
			}
		}
		for _, h := range ScoreHistogram(scored, hist, c.classes[model]) {
			out = append(out, ScoreDelta{Model: model, Bucket: h.Bucket, Class: h.Class, Bin: h.Bin, N: h.N})
		}
	}
	slices.SortFunc(out, func(x, y ScoreDelta) int {
		return cmp.Or(cmp.Compare(x.Model, y.Model), x.Bucket.Compare(y.Bucket), cmp.Compare(x.Class, y.Class), cmp.Compare(x.Bin, y.Bin))
	})
	return out
}

// calibrationDeltas returns the net calibration and Brier deltas, ordered
// by model, bucket and bin.
func (c *ChangeSet) calibrationDeltas() ([]CalibrationDelta, []BrierDelta) {
	keys := make([]calKey, 0, len(c.cal))
	for k := range c.cal {
		keys = append(keys, k)
	}
	slices.SortFunc(keys, func(x, y calKey) int {
		return cmp.Or(cmp.Compare(x.model, y.model), cmp.Compare(x.bucket, y.bucket), cmp.Compare(x.bin, y.bin))
	})
	var (
		cal   []CalibrationDelta
		brier []BrierDelta
		nanos []int64
	)
	for _, k := range keys {
		e := c.cal[k]
		if e.N != 0 || e.ScoreSum != 0 || e.Correct != 0 {
			cal = append(cal, CalibrationDelta{Model: k.model, Bucket: e.Bucket, Bin: k.bin, N: e.N, ScoreSum: FromNano(e.ScoreSum), Correct: e.Correct})
		}
		if n := len(brier); n > 0 && brier[n-1].Model == k.model && brier[n-1].Bucket.Equal(e.Bucket) {
			brier[n-1].N += e.N
			nanos[n-1] += e.Brier
			continue
		}
		brier = append(brier, BrierDelta{Model: k.model, Bucket: e.Bucket, N: e.N})
		nanos = append(nanos, e.Brier)
	}
	out := brier[:0]
	for i, b := range brier {
		if b.N != 0 || nanos[i] != 0 {
			b.Sum = FromNano(nanos[i])
			out = append(out, b)
		}
	}
	return cal, out
}
