package windows

// Interval is a two-sided confidence interval [Lo, Hi].
type Interval struct {
	Lo float64
	Hi float64
}

// ClassMetrics are the one-vs-rest figures of one class. A nil pointer is an
// undefined ratio (zero denominator): absent from /metrics, null in JSON.
type ClassMetrics struct {
	Class string
	// Support is the number of labeled examples whose actual class this is.
	Support        int64
	TP, FP, FN, TN int64
	// PredictedCount counts all predictions of this class, labeled or not.
	PredictedCount int64

	Recall         *float64
	Precision      *float64
	Specificity    *float64
	F1             *float64
	Prevalence     *float64
	PredictedShare *float64

	RecallInterval      *Interval
	PrecisionInterval   *Interval
	SpecificityInterval *Interval

	// Early-warning figures (README.md "Early warning"), set by
	// AddEarlyWarning against a reference window; nil when undefined.
	// EstimatedPrevalence is the black-box shift estimate with its
	// delta-method interval, EstimatedPrecision the precision expected
	// under label shift, ScoreShift the Jensen–Shannon distance of the
	// class's score histogram from the reference's.
	EstimatedPrevalence         *float64
	EstimatedPrevalenceInterval *Interval
	EstimatedPrecision          *float64
	ScoreShift                  *float64
}

// Metrics are the figures of one matrix. Nil pointers are undefined ratios.
type Metrics struct {
	// Predictions counts all predictions in scope, labeled or not; Labeled
	// those with a label (the matrix total).
	Predictions int64
	Labeled     int64

	Accuracy         *float64
	BalancedAccuracy *float64
	MacroF1          *float64
	LabelCoverage    *float64
	// MCC is the multi-class Matthews correlation (Gorodkin 2004's R_K).
	MCC *float64
	// Kappa is Cohen's kappa.
	Kappa *float64

	// Score figures over labeled predictions with scores, set by
	// AddEarlyWarning; nil when the period's scores are unknown (Scores)
	// or none was labeled (the rest).
	Scores           *ScoreSums
	Brier            *float64
	CalibrationError *float64

	// PerClass is in the matrix's class order.
	PerClass []ClassMetrics
}
