package windows

import (
	"math"

	"github.com/classwatch/classwatch/windows/stats"
	"github.com/classwatch/classwatch/windows/store"
)

// ScoreSums are a period's score aggregates (README.md "Early warning"),
// summed over its buckets: what the calibration and score-shift figures
// are computed from. Predictions without scores count nowhere.
type ScoreSums struct {
	// Hist[k][b] counts scored predictions whose score for class k (of the
	// matrix's class order) lies in bin b (store.ScoreBin); a class missing
	// from a prediction's scores counts in bin 0.
	Hist [][store.ScoreBins]int64
	// Calib[b] aggregates labeled scored predictions by the bin of their
	// predicted class's score.
	Calib [store.ScoreBins]CalibrationBin
	// BrierN labeled scored predictions have BrierSum as the sum of their
	// Σ_k (s_k − 1[actual = k])².
	BrierN   int64
	BrierSum float64
}

// CalibrationBin aggregates the labeled scored predictions of one bin.
type CalibrationBin struct {
	N        int64
	ScoreSum float64
	Correct  int64
}

// ReliabilityBin is one bin of a reliability diagram: how many labeled
// scored predictions fell in it, their mean predicted-class score and
// their accuracy (nil when the bin is empty).
type ReliabilityBin struct {
	Count     int64    `json:"count"`
	MeanScore *float64 `json:"mean_score"`
	Accuracy  *float64 `json:"accuracy"`
}

// NewScoreSums returns empty sums for k classes.
func NewScoreSums(k int) *ScoreSums {
	return &ScoreSums{Hist: make([][store.ScoreBins]int64, k)}
}

// Scored returns the number of labeled predictions with scores.
func (s *ScoreSums) Scored() int64 { return s.BrierN }

// Brier returns the multi-class Brier score (Brier 1950): the mean over
// labeled scored predictions of Σ_k (s_k − 1[actual = k])², in [0, 2]; for
// two classes twice scikit-learn's brier_score_loss. Nil without any.
func (s *ScoreSums) Brier() *float64 {
	if s.BrierN == 0 {
		return nil
	}
	v := s.BrierSum / float64(s.BrierN)
	return &v
}

// Reliability returns the reliability bins: store.ScoreBins equal-width
// bins of the predicted class's score over [0, 1], the last holding 1.
func (s *ScoreSums) Reliability() []ReliabilityBin {
	out := make([]ReliabilityBin, store.ScoreBins)
	for b, c := range s.Calib {
		out[b].Count = c.N
		if c.N > 0 {
			mean, acc := c.ScoreSum/float64(c.N), float64(c.Correct)/float64(c.N)
			out[b].MeanScore, out[b].Accuracy = &mean, &acc
		}
	}
	return out
}

// CalibrationError returns the expected calibration error over the
// reliability bins, Σ_b (n_b/N)·|accuracy_b − mean score_b| (Naeini,
// Cooper & Hauskrecht 2015; Guo et al. 2017 on the top-label score), in
// [0, 1]. Nil without labeled scored predictions.
func (s *ScoreSums) CalibrationError() *float64 {
	var n int64
	var sum float64
	for _, c := range s.Calib {
		if c.N > 0 {
			n += c.N
			sum += math.Abs(float64(c.Correct) - c.ScoreSum) // n_b·|acc_b − mean_b|
		}
	}
	if n == 0 {
		return nil
	}
	v := sum / float64(n)
	return &v
}

// ScoreShift returns the Jensen–Shannon distance (Lin 1991; natural
// logarithm, in [0, √ln 2], as scipy.spatial.distance.jensenshannon) between
// class k's score histogram in s and in ref; nil when either has no scored
// prediction.
func (s *ScoreSums) ScoreShift(ref *ScoreSums, k int) *float64 {
	if k >= len(s.Hist) || k >= len(ref.Hist) {
		return nil
	}
	p, q := make([]float64, store.ScoreBins), make([]float64, store.ScoreBins)
	var np, nq int64
	for b := range store.ScoreBins {
		p[b], q[b] = float64(s.Hist[k][b]), float64(ref.Hist[k][b])
		np += s.Hist[k][b]
		nq += ref.Hist[k][b]
	}
	if np == 0 || nq == 0 {
		return nil
	}
	d, err := stats.JensenShannon(p, q)
	if err != nil {
		return nil // unreachable: two non-empty histograms of equal length
	}
	return &d
}

// EstimatedPrecision returns class k's precision expected under pure label
// shift: P(actual k | predicted k) = q_k·C_kk / μ_k, with q the estimated
// prevalence, C_kk the reference's recall of k (P(predicted k | actual k),
// unchanged under label shift) and μ_k the window's predicted share of k.
// It is clipped to 1, which estimation error can exceed; nil when μ_k is 0.
func EstimatedPrecision(q float64, refRecall float64, predictedShare float64) *float64 {
	if predictedShare == 0 {
		return nil
	}
	v := min(q*refRecall/predictedShare, 1)
	return &v
}

// Reference is the period the early-warning figures compare a window with,
// usually a matured window whose labels are mostly in (a model's
// reference_window, README.md "Configuration").
type Reference struct {
	// Matrix is the reference's labeled matrix, over the same classes as
	// the window.
	Matrix *Matrix
	// Scores are its score aggregates; nil when unknown.
	Scores *ScoreSums
}

// AddEarlyWarning sets the early-warning figures of ms, the metrics of a
// period with predicted-class counts pred (all predictions) and score
// aggregates scores (nil when unknown), against ref (nil when the model
// has none): Brier score, calibration error and reliability bins from
// scores; per class, with a reference over the same classes, the
// estimated prevalence (stats.BBSE, interval at confidence), the precision
// expected under label shift (EstimatedPrecision) and, with both periods'
// scores, the score shift.
func AddEarlyWarning(ms *Metrics, pred []int64, scores *ScoreSums, ref *Reference, confidence float64) {
	if scores != nil {
		ms.Scores = scores
		ms.Brier = scores.Brier()
		ms.CalibrationError = scores.CalibrationError()
	}
	k := len(ms.PerClass)
	if ref == nil || ref.Matrix == nil || ref.Matrix.Len() != k || len(pred) != k {
		return
	}
	if scores != nil && ref.Scores != nil {
		for c := range k {
			ms.PerClass[c].ScoreShift = scores.ScoreShift(ref.Scores, c)
		}
	}
	est, ok, err := stats.BBSE(ref.Matrix.Dense(), pred, confidence)
	if err != nil || !ok {
		return // malformed input is impossible here; undefined stays nil
	}
	for c := range k {
		cm := &ms.PerClass[c]
		cm.EstimatedPrevalence = &est.Prevalence[c]
		cm.EstimatedPrevalenceInterval = &Interval{Lo: est.Lo[c], Hi: est.Hi[c]}
		if cm.PredictedShare != nil {
			recall := float64(ref.Matrix.At(c, c)) / float64(ref.Matrix.Row(c))
			cm.EstimatedPrecision = EstimatedPrecision(est.Prevalence[c], recall, *cm.PredictedShare)
		}
	}
}

// Aligned returns r over classes, which must extend r's classes (a period
// read from the store may hold classes registered since); nil when r is
// nil or its classes are not a prefix of classes.
func (r *Reference) Aligned(classes []string) *Reference {
	if r == nil || r.Matrix == nil {
		return nil
	}
	m, err := r.Matrix.Grow(classes)
	if err != nil {
		return nil
	}
	out := &Reference{Matrix: m}
	if r.Scores != nil {
		out.Scores = r.Scores.clone()
		out.Scores.grow(len(classes))
	}
	return out
}
