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
	// Scores are the period's score aggregates, per class index of Matrix.
	Scores *ScoreSums
	// Reference is the model's reference window at the same watermark;
	// nil when the model has none.
	Reference *Reference
}

// Metrics computes the view's figures at the given confidence, the
// early-warning figures included (AddEarlyWarning).
func (v View) Metrics(confidence float64) Metrics {
	ms := Compute(v.Matrix, v.Predicted, confidence)
	AddEarlyWarning(&ms, v.Predicted, v.Scores, v.Reference, confidence)
	return ms
}

// ScoresFromCounts sums the score aggregates of store counts per class
// index of classes. It fails on a class not in classes.
func ScoresFromCounts(classes []string, c store.Counts) (*ScoreSums, error) {
	index := make(map[string]int, len(classes))
	for i, cl := range classes {
		index[cl] = i
	}
	s := NewScoreSums(len(classes))
	for _, h := range c.Scores {
		k, ok := index[h.Class]
		if !ok {
			return nil, fmt.Errorf("sum score counts: unknown class %q", h.Class)
		}
		if h.Bin < 0 || h.Bin >= store.ScoreBins {
			return nil, fmt.Errorf("sum score counts: bin %d out of range", h.Bin)
		}
		s.Hist[k][h.Bin] += h.N
	}
	for _, cb := range c.Calibration {
		if cb.Bin < 0 || cb.Bin >= store.ScoreBins {
			return nil, fmt.Errorf("sum calibration counts: bin %d out of range", cb.Bin)
		}
		s.Calib[cb.Bin].N += cb.N
		s.Calib[cb.Bin].ScoreSum += cb.ScoreSum
		s.Calib[cb.Bin].Correct += cb.Correct
	}
	for _, b := range c.Brier {
		s.BrierN += b.N
		s.BrierSum += b.Sum
	}
	return s, nil
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
