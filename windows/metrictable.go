package windows

import (
	"math"
	"slices"
)

// MetricScope says what one value of a metric describes.
type MetricScope int8

// Scopes.
const (
	// ScopeWindow metrics have one value per model and window.
	ScopeWindow MetricScope = iota
	// ScopeClass metrics have one value per model, window and class.
	ScopeClass
)

// MetricDef defines one window metric once, for every place that shows it:
// the JSON API and the audit CSV use Name, the audit table Title, /metrics
// Prom and Help, alert rules Name, Min, Counts and Judged. Adding a metric is
// adding a MetricDef to MetricDefs (and its value to Metrics); see README.md
// "Metric definitions" for what each one means.
//
// The counts every scrape and report carries besides (predictions, labeled,
// per class support and predictions, the confusion cells, the window
// bounds) are the frame the metrics are computed from and are not listed.
type MetricDef struct {
	// Name is the metric's name in the JSON API, the audit CSV and alert
	// rules, in snake case ("balanced_accuracy").
	Name string
	// Title is its heading in the audit table ("balanced accuracy").
	Title string
	// Prom is its Prometheus gauge family; empty for a metric not exported.
	// Names follow the Prometheus conventions: "_ratio" for a figure in
	// [0, 1], no unit suffix for a correlation in [−1, 1].
	Prom string
	// Help is the family's help text.
	Help  string
	Scope MetricScope
	// Min is the least value the metric takes: 0, or −1 for a correlation.
	Min float64
	// Max is the greatest value when it is not 1 (zero means 1).
	Max float64
	// Value reads the metric from computed figures; k is the class index
	// for ScopeClass metrics and ignored otherwise. Nil is undefined.
	Value func(ms *Metrics, k int) *float64
	// Interval reads the metric's confidence interval; nil for a metric
	// without one.
	Interval func(ms *Metrics, k int) *Interval
	// PromBounds, when set, exports Interval's bounds as the families
	// PromLower and PromUpper; it names the interval for their help text
	// ("Wilson score interval of the class's recall").
	PromBounds string
	// Counts returns the successes and trials of a metric that is a
	// proportion of counts, for binomial tests; nil for any other metric.
	Counts func(m *Matrix, pred []int64, k int) (x, n int64)
	// Judged returns the count a metric that is not a proportion rests
	// on, for minimum-count checks; nil when Counts is set. A metric with
	// neither is not offered to alert rules.
	Judged func(ms *Metrics, m *Matrix, k int) int64
	// FromScores marks a metric computed from the score aggregates
	// (README.md "Early warning"), undefined for unscored predictions.
	FromScores bool
}

// PromLower names the family of the interval's lower bound.
func (d MetricDef) PromLower() string { return trimRatio(d.Prom) + "_lower_ratio" }

// PromUpper names the family of the interval's upper bound.
func (d MetricDef) PromUpper() string { return trimRatio(d.Prom) + "_upper_ratio" }

func trimRatio(name string) string {
	const suffix = "_ratio"
	if len(name) > len(suffix) && name[len(name)-len(suffix):] == suffix {
		return name[:len(name)-len(suffix)]
	}
	return name
}

// LookupMetric returns the metric named name (MetricDef.Name).
func LookupMetric(name string) (MetricDef, bool) {
	defs := MetricDefs()
	if i := slices.IndexFunc(defs, func(d MetricDef) bool { return d.Name == name }); i >= 0 {
		return defs[i], true
	}
	return MetricDef{}, false
}

// MetricDefs returns every window metric, window-scope metrics first, in
// the order reports list them. Each call returns a new slice.
func MetricDefs() []MetricDef {
	return []MetricDef{
		{
			Name: "label_coverage", Title: "label coverage", Prom: "classwatch_label_coverage_ratio",
			Help:  "Labeled predictions over all predictions in the window.",
			Value: func(ms *Metrics, _ int) *float64 { return ms.LabelCoverage },
			Counts: func(m *Matrix, pred []int64, _ int) (int64, int64) {
				return m.Total(), sumCounts(pred)
			},
		},
		{
			Name: "accuracy", Title: "accuracy", Prom: "classwatch_accuracy_ratio",
			Help:  "Correct predictions over labeled predictions in the window.",
			Value: func(ms *Metrics, _ int) *float64 { return ms.Accuracy },
			Counts: func(m *Matrix, _ []int64, _ int) (int64, int64) {
				return m.Trace(), m.Total()
			},
		},
		{
			Name: "balanced_accuracy", Title: "balanced accuracy", Prom: "classwatch_balanced_accuracy_ratio",
			Help:   "Mean recall over the classes with at least one labeled example in the window.",
			Value:  func(ms *Metrics, _ int) *float64 { return ms.BalancedAccuracy },
			Judged: labeled,
		},
		{
			Name: "macro_f1", Title: "macro F1", Prom: "classwatch_macro_f1_ratio",
			Help:   "Mean F1 over the classes present among the window's actual or predicted classes.",
			Value:  func(ms *Metrics, _ int) *float64 { return ms.MacroF1 },
			Judged: labeled,
		},
		{
			Name: "mcc", Title: "MCC", Prom: "classwatch_matthews_correlation", Min: -1,
			Help:   "Multi-class Matthews correlation coefficient (Gorodkin's R_K) of the window's labeled predictions, in [-1, 1].",
			Value:  func(ms *Metrics, _ int) *float64 { return ms.MCC },
			Judged: labeled,
		},
		{
			Name: "kappa", Title: "Cohen's kappa", Prom: "classwatch_cohen_kappa", Min: -1,
			Help:   "Cohen's kappa of the window's labeled predictions against their labels, in [-1, 1].",
			Value:  func(ms *Metrics, _ int) *float64 { return ms.Kappa },
			Judged: labeled,
		},
		{
			Name: "scored", Title: "labeled with scores", Prom: "classwatch_window_scored", FromScores: true,
			Help: "Labeled predictions made in the window that carry scores.",
			Value: func(ms *Metrics, _ int) *float64 {
				if ms.Scores == nil {
					return nil
				}
				v := float64(ms.Scores.Scored())
				return &v
			},
		},
		{
			Name: "brier", Title: "Brier score", Prom: "classwatch_brier_score", Max: 2, FromScores: true,
			Help:   "Multi-class Brier score of the window's labeled predictions with scores: mean of the sum over classes of (score - 1[actual]) squared, in [0, 2].",
			Value:  func(ms *Metrics, _ int) *float64 { return ms.Brier },
			Judged: scored,
		},
		{
			Name: "calibration_error", Title: "calibration error", Prom: "classwatch_calibration_error_ratio", FromScores: true,
			Help:   "Expected calibration error of the predicted class's score over 10 equal-width bins, on the window's labeled predictions with scores.",
			Value:  func(ms *Metrics, _ int) *float64 { return ms.CalibrationError },
			Judged: scored,
		},
		{
			Name: "recall", Title: "recall", Prom: "classwatch_recall_ratio", Scope: ScopeClass,
			Help:       "Recall of the class in the window: true positives over labeled examples of the class.",
			Value:      func(ms *Metrics, k int) *float64 { return ms.PerClass[k].Recall },
			Interval:   func(ms *Metrics, k int) *Interval { return ms.PerClass[k].RecallInterval },
			PromBounds: "Wilson score interval of the class's recall",
			Counts: func(m *Matrix, _ []int64, k int) (int64, int64) {
				return m.At(k, k), m.Row(k)
			},
		},
		{
			Name: "precision", Title: "precision", Prom: "classwatch_precision_ratio", Scope: ScopeClass,
			Help:     "Precision of the class in the window: true positives over labeled predictions of the class.",
			Value:    func(ms *Metrics, k int) *float64 { return ms.PerClass[k].Precision },
			Interval: func(ms *Metrics, k int) *Interval { return ms.PerClass[k].PrecisionInterval },
			Counts: func(m *Matrix, _ []int64, k int) (int64, int64) {
				return m.At(k, k), m.Col(k)
			},
		},
		{
			Name: "specificity", Title: "specificity", Prom: "classwatch_specificity_ratio", Scope: ScopeClass,
			Help:     "Specificity of the class in the window: true negatives over labeled examples of other classes.",
			Value:    func(ms *Metrics, k int) *float64 { return ms.PerClass[k].Specificity },
			Interval: func(ms *Metrics, k int) *Interval { return ms.PerClass[k].SpecificityInterval },
			Counts: func(m *Matrix, _ []int64, k int) (int64, int64) {
				negatives := m.Total() - m.Row(k)
				fp := m.Col(k) - m.At(k, k)
				return negatives - fp, negatives
			},
		},
		{
			Name: "f1", Title: "F1", Prom: "classwatch_f1_ratio", Scope: ScopeClass,
			Help:  "F1 score of the class in the window.",
			Value: func(ms *Metrics, k int) *float64 { return ms.PerClass[k].F1 },
			// F1 is defined by TP, FP and FN: it rests on the examples that
			// are actual or predicted k.
			Judged: func(_ *Metrics, m *Matrix, k int) int64 { return m.Row(k) + m.Col(k) - m.At(k, k) },
		},
		{
			Name: "prevalence", Title: "prevalence", Prom: "classwatch_prevalence_ratio", Scope: ScopeClass,
			Help:  "Labeled examples of the class over all labeled predictions in the window.",
			Value: func(ms *Metrics, k int) *float64 { return ms.PerClass[k].Prevalence },
			Counts: func(m *Matrix, _ []int64, k int) (int64, int64) {
				return m.Row(k), m.Total()
			},
		},
		{
			Name: "predicted_share", Title: "predicted share", Prom: "classwatch_predicted_ratio", Scope: ScopeClass,
			Help:  "Predictions of the class over all predictions in the window, labeled or not.",
			Value: func(ms *Metrics, k int) *float64 { return ms.PerClass[k].PredictedShare },
			Counts: func(_ *Matrix, pred []int64, k int) (int64, int64) {
				return pred[k], sumCounts(pred)
			},
		},
		{
			Name: "estimated_prevalence", Title: "estimated prevalence", Prom: "classwatch_estimated_prevalence_ratio", Scope: ScopeClass,
			Help:       "Prevalence of the class in the window estimated from the predicted mix by black-box shift estimation against the reference window.",
			Value:      func(ms *Metrics, k int) *float64 { return ms.PerClass[k].EstimatedPrevalence },
			Interval:   func(ms *Metrics, k int) *Interval { return ms.PerClass[k].EstimatedPrevalenceInterval },
			PromBounds: "delta-method interval of the class's estimated prevalence",
			Judged:     predictions,
		},
		{
			Name: "estimated_precision", Title: "estimated precision", Prom: "classwatch_estimated_precision_ratio", Scope: ScopeClass,
			Help:   "Precision of the class expected under label shift: estimated prevalence times the reference window's recall, over the window's predicted share.",
			Value:  func(ms *Metrics, k int) *float64 { return ms.PerClass[k].EstimatedPrecision },
			Judged: func(ms *Metrics, _ *Matrix, k int) int64 { return ms.PerClass[k].PredictedCount },
		},
		{
			Name: "score_shift", Title: "score shift", Prom: "classwatch_score_shift_distance", Scope: ScopeClass, Max: math.Sqrt(math.Ln2), FromScores: true,
			Help:   "Jensen-Shannon distance (natural logarithm, in [0, 0.833]) between the class's score histogram in the window and in the reference window.",
			Value:  func(ms *Metrics, k int) *float64 { return ms.PerClass[k].ScoreShift },
			Judged: predictions,
		},
	}
}

func labeled(_ *Metrics, m *Matrix, _ int) int64 { return m.Total() }

func predictions(ms *Metrics, _ *Matrix, _ int) int64 { return ms.Predictions }

func scored(ms *Metrics, _ *Matrix, _ int) int64 {
	if ms.Scores == nil {
		return 0
	}
	return ms.Scores.Scored()
}

func sumCounts(v []int64) int64 {
	var s int64
	for _, x := range v {
		s += x
	}
	return s
}
