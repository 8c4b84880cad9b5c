package windows

import (
	"fmt"
	"math"

	"github.com/classwatch/classwatch/windows/stats"
)

// Compute returns the figures of m: per class the one-vs-rest counts,
// recall TP/(TP+FN), precision TP/(TP+FP), specificity TN/(TN+FP), F1,
// prevalence (support over labeled) and predicted share (predictions of the
// class over all predictions), each of the first three with a Wilson score
// interval at confidence (e.g. 0.95; outside (0, 1) the intervals are nil);
// overall the accuracy, balanced accuracy, macro F1, label coverage (labeled
// over all predictions), MCC and Cohen's kappa. A ratio whose denominator is
// zero is nil.
//
// predicted[k] counts every prediction of class k in scope, labeled or not,
// so it holds at least column k of m; nil means every prediction is labeled
// and the column sums are used. Compute panics if predicted is not nil and
// its length is not m.Len(). m must hold no negative cell.
//
// The figures agree with scikit-learn where it has them, except that
// scikit-learn puts 0 (zero_division, or its own convention) where Compute
// reports an undefined ratio:
//
//   - Per-class F1 is 2·TP/(2·TP + FP + FN), equal to 2·P·R/(P + R) whenever
//     P and R are defined and not both 0. It is 0 for a class that occurs as
//     actual or predicted class but is never predicted correctly, even when
//     its precision or recall is undefined (never predicted, or never
//     actual), as in precision_recall_fscore_support(zero_division=0); it is
//     nil only for a class that occurs on neither axis.
//   - MacroF1 is the mean F1 over the classes that occur on either axis of
//     m (unlabeled predictions do not count): f1_score(average='macro',
//     labels=those classes, zero_division=0).
//   - BalancedAccuracy is the mean recall over the classes with support, as
//     balanced_accuracy_score(adjusted=False).
//   - MCC is Gorodkin's (2004) R_K, as matthews_corrcoef, but nil (not 0)
//     when all actual or all predicted labels are one class.
//   - Kappa is Cohen's kappa, as cohen_kappa_score; nil when every actual
//     and predicted label is one and the same class (there NaN).
func Compute(m *Matrix, predicted []int64, confidence float64) Metrics {
	k := m.Len()
	if predicted != nil && len(predicted) != k {
		panic(fmt.Sprintf("windows: Compute: %d predicted counts for %d classes", len(predicted), k))
	}
	rows := make([]int64, k)
	cols := make([]int64, k)
	var n, trace int64
	for a := range k {
		for p, v := range m.cells[a*k : (a+1)*k] {
			rows[a] += v
			cols[p] += v
		}
		trace += m.cells[a*k+a]
	}
	for _, r := range rows {
		n += r
	}
	if predicted == nil {
		predicted = cols
	}
	var predictions int64
	for _, c := range predicted {
		predictions += c
	}

	// The pointers of all ratios and intervals point into two backing
	// arrays, which keeps a 100-class computation to a handful of
	// allocations instead of one per figure.
	vals := make([]float64, 0, 6*k+6) // six per class, six overall
	ratio := func(num, den int64) *float64 {
		if den == 0 {
			return nil
		}
		vals = append(vals, float64(num)/float64(den))
		return &vals[len(vals)-1]
	}
	value := func(v float64) *float64 {
		vals = append(vals, v)
		return &vals[len(vals)-1]
	}
	ivs := make([]Interval, 0, 3*k)
	interval := func(successes, trials int64) *Interval {
		lo, hi, ok := stats.Wilson(successes, trials, confidence)
		if !ok {
			return nil
		}
		ivs = append(ivs, Interval{Lo: lo, Hi: hi})
		return &ivs[len(ivs)-1]
	}

	out := Metrics{
		Predictions:   predictions,
		Labeled:       n,
		Accuracy:      ratio(trace, n),
		LabelCoverage: ratio(n, predictions),
		PerClass:      make([]ClassMetrics, k),
	}
	var recallSum, f1Sum float64
	var withSupport, present int
	for c := range k {
		tp := m.cells[c*k+c]
		cm := ClassMetrics{
			Class:          m.classes[c],
			Support:        rows[c],
			TP:             tp,
			FN:             rows[c] - tp,
			FP:             cols[c] - tp,
			TN:             n - rows[c] - cols[c] + tp,
			PredictedCount: predicted[c],
		}
		cm.Recall = ratio(tp, rows[c])
		cm.Precision = ratio(tp, cols[c])
		cm.Specificity = ratio(cm.TN, cm.TN+cm.FP)
		cm.F1 = ratio(2*tp, 2*tp+cm.FP+cm.FN)
		cm.Prevalence = ratio(rows[c], n)
		cm.PredictedShare = ratio(predicted[c], predictions)
		cm.RecallInterval = interval(tp, rows[c])
		cm.PrecisionInterval = interval(tp, cols[c])
		cm.SpecificityInterval = interval(cm.TN, cm.TN+cm.FP)
		if cm.Recall != nil {
			recallSum += *cm.Recall
			withSupport++
		}
		if cm.F1 != nil {
			f1Sum += *cm.F1
			present++
		}
		out.PerClass[c] = cm
	}
	if withSupport > 0 {
		out.BalancedAccuracy = value(recallSum / float64(withSupport))
	}
	if present > 0 {
		out.MacroF1 = value(f1Sum / float64(present))
	}

	// MCC and kappa share the covariance of actual and predicted labels,
	// n·trace − Σ rowₖ·colₖ (Gorodkin 2004). Products are taken in float64:
	// exact while n² < 2⁵³ (n below about 9.4e7), and past that the
	// rounding is relative to n², far below what either figure can show.
	nf := float64(n)
	var rowCol, rowRow, colCol float64
	for c := range k {
		r, p := float64(rows[c]), float64(cols[c])
		rowCol += r * p
		rowRow += r * r
		colCol += p * p
	}
	cov := nf*float64(trace) - rowCol
	if varActual, varPredicted := nf*nf-rowRow, nf*nf-colCol; varActual > 0 && varPredicted > 0 {
		out.MCC = value(clampCorrelation(cov / math.Sqrt(varActual*varPredicted)))
	}
	// Kappa = (pₒ − pₑ)/(1 − pₑ) with pₒ = trace/n and pₑ = Σ rowₖ·colₖ/n².
	if den := nf*nf - rowCol; den > 0 {
		out.Kappa = value(clampCorrelation(cov / den))
	}
	return out
}

// clampCorrelation confines a correlation to [−1, 1], which rounding can
// leave by an ulp (a perfect classifier's MCC is cov/√(cov²)).
func clampCorrelation(x float64) float64 { return min(max(x, -1), 1) }
