package alerts

import "github.com/classwatch/classwatch/windows"

// metricSpec says how a floor, ceiling or drop rule reads one window metric.
// Names are the metric names of the JSON API (README.md "HTTP API").
type metricSpec struct {
	perClass bool
	// min is the least value the metric takes: 0, or −1 for mcc and kappa.
	min float64
	// counts returns the successes and trials of a proportion metric for
	// class k (ignored when not per class). It is nil for metrics that are
	// not a proportion of counts and so have no binomial interval.
	counts func(m *windows.Matrix, pred []int64, k int) (x, n int64)
	// value reads a metric that is not a proportion from the computed
	// figures, with the count it is judged on.
	value func(ms windows.Metrics, m *windows.Matrix, k int) (v *float64, n int64)
}

// metricSpecs are the metrics a floor or ceiling rule may watch.
var metricSpecs = map[string]metricSpec{
	"recall": {perClass: true, counts: func(m *windows.Matrix, _ []int64, k int) (int64, int64) {
		return m.At(k, k), m.Row(k)
	}},
	"precision": {perClass: true, counts: func(m *windows.Matrix, _ []int64, k int) (int64, int64) {
		return m.At(k, k), m.Col(k)
	}},
	"specificity": {perClass: true, counts: func(m *windows.Matrix, _ []int64, k int) (int64, int64) {
		negatives := m.Total() - m.Row(k)
		fp := m.Col(k) - m.At(k, k)
		return negatives - fp, negatives
	}},
	"prevalence": {perClass: true, counts: func(m *windows.Matrix, _ []int64, k int) (int64, int64) {
		return m.Row(k), m.Total()
	}},
	"predicted_share": {perClass: true, counts: func(_ *windows.Matrix, pred []int64, k int) (int64, int64) {
		return pred[k], sum(pred)
	}},
	"accuracy": {counts: func(m *windows.Matrix, _ []int64, _ int) (int64, int64) {
		return m.Trace(), m.Total()
	}},
	"label_coverage": {counts: func(m *windows.Matrix, pred []int64, _ int) (int64, int64) {
		return m.Total(), sum(pred)
	}},
	"f1": {perClass: true, value: func(ms windows.Metrics, m *windows.Matrix, k int) (*float64, int64) {
		// F1 is defined by TP, FP and FN; its count is the examples that
		// are either actual or predicted k.
		return ms.PerClass[k].F1, m.Row(k) + m.Col(k) - m.At(k, k)
	}},
	"balanced_accuracy": {value: func(ms windows.Metrics, m *windows.Matrix, _ int) (*float64, int64) {
		return ms.BalancedAccuracy, m.Total()
	}},
	"macro_f1": {value: func(ms windows.Metrics, m *windows.Matrix, _ int) (*float64, int64) {
		return ms.MacroF1, m.Total()
	}},
	"mcc": {min: -1, value: func(ms windows.Metrics, m *windows.Matrix, _ int) (*float64, int64) {
		return ms.MCC, m.Total()
	}},
	"kappa": {min: -1, value: func(ms windows.Metrics, m *windows.Matrix, _ int) (*float64, int64) {
		return ms.Kappa, m.Total()
	}},
}

func sum(v []int64) int64 {
	var s int64
	for _, x := range v {
		s += x
	}
	return s
}
