package windows

import (
	"fmt"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// View is a snapshot of one model's figures over one period: the window's
// bounds at the current watermark, its matrix, and its predicted-class
// counts. A View owns its matrix; callers may keep it.
type View struct {
	Model  string
	Window Window
	// From and To bound the buckets covered: starts in [From, To).
	From, To  time.Time
	Watermark time.Time
	// Matrix counts the labeled predictions made in the period.
	Matrix *Matrix
	// Predicted counts all predictions made in the period per class index
	// of Matrix, labeled or not.
	Predicted []int64
}

// Metrics computes the view's figures at the given confidence.
func (v View) Metrics(confidence float64) Metrics {
	return Compute(v.Matrix, v.Predicted, confidence)
}

// FromCounts sums store counts into a matrix over classes and a predicted
// count vector. It fails on a class not in classes.
func FromCounts(classes []string, c store.Counts) (*Matrix, []int64, error) {
	m := NewMatrix(classes)
	pred := make([]int64, len(classes))
	for _, cell := range c.Cells {
		if err := m.AddNamed(cell.Actual, cell.Predicted, cell.N); err != nil {
			return nil, nil, fmt.Errorf("sum cells: %w", err)
		}
	}
	for _, p := range c.Predicted {
		k, ok := m.Index(p.Predicted)
		if !ok {
			return nil, nil, fmt.Errorf("sum predicted counts: unknown class %q", p.Predicted)
		}
		pred[k] += p.N
	}
	return m, pred, nil
}
