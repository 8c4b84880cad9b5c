package alerts

import (
	"cmp"

	"github.com/classwatch/classwatch/windows"
)

// metricSpec says how a floor, ceiling or drop rule reads one window metric.
// Every spec comes from windows.MetricDefs, so the names are the metric
// names of the JSON API (README.md "HTTP API").
type metricSpec struct {
	perClass bool
	// min and max bound the metric's values: [0, 1] for most, [−1, 1]
	// for mcc and kappa, [0, 2] for brier.
	min, max float64
	// counts returns the successes and trials of a proportion metric for
	// class k (ignored when not per class). It is nil for metrics that are
	// not a proportion of counts and so have no binomial interval.
	counts func(m *windows.Matrix, pred []int64, k int) (x, n int64)
	// value reads a metric that is not a proportion from the computed
	// figures, with the count it is judged on.
	value func(ms windows.Metrics, m *windows.Matrix, k int) (v *float64, n int64)
}

// metricSpecs are the metrics a floor or ceiling rule may watch: every
// metric of windows.MetricDefs that a proportion's counts or a count it is
// judged on backs.
var metricSpecs = specsFromTable(windows.MetricDefs())

func specsFromTable(defs []windows.MetricDef) map[string]metricSpec {
	specs := make(map[string]metricSpec, len(defs))
	for _, d := range defs {
		spec := metricSpec{perClass: d.Scope == windows.ScopeClass, min: d.Min, max: cmp.Or(d.Max, 1), counts: d.Counts}
		switch {
		case d.Counts != nil:
		case d.Judged != nil:
			spec.value = func(ms windows.Metrics, m *windows.Matrix, k int) (*float64, int64) {
				return d.Value(&ms, k), d.Judged(&ms, m, k)
			}
		default:
			continue
		}
		specs[d.Name] = spec
	}
	return specs
}

func sum(v []int64) int64 {
	var s int64
	for _, x := range v {
		s += x
	}
	return s
}
