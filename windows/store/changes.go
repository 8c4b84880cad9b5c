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

// Changes returns the net deltas, leaving out those that cancelled, ordered
// by model, bucket and class names.
func (c *ChangeSet) Changes() Changes {
	var out Changes
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
