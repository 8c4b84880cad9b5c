package alerts

import (
	"cmp"
	"context"
	"fmt"
	"maps"
	"slices"
	"strings"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/stats"
)

var boundKeys = []string{"metric", "classes", "threshold", "interval"}

func boundDefaults(r *Rule) { r.Interval = cmp.Or(r.Interval, IntervalWilson) }

// boundEval evaluates a floor or ceiling rule: it fires only when the
// whole interval lies beyond the threshold.
type boundEval struct {
	r       *Rule
	metric  metricSpec
	ceiling bool
}

// newBound returns the constructor of floor (ceiling false) or ceiling
// rules.
func newBound(ceiling bool) func(r *Rule, bad badFunc) Evaluator {
	return func(r *Rule, bad badFunc) Evaluator {
		e := &boundEval{r: r, ceiling: ceiling}
		spec, ok := metricSpecs[r.Metric]
		switch {
		case r.Metric == "":
			bad("metric", "required")
		case !ok:
			bad("metric", "%q is not one of %s", r.Metric, strings.Join(slices.Sorted(maps.Keys(metricSpecs)), ", "))
		default:
			e.metric = spec
			if !spec.perClass && len(r.Classes) > 0 {
				bad("classes", "metric %s is not per class", r.Metric)
			}
			switch r.Interval {
			case IntervalWilson, IntervalJeffreys:
				if spec.counts == nil {
					bad("interval", "metric %s is not a proportion and has no %s interval; set interval: none to compare its point value", r.Metric, r.Interval)
				}
			case IntervalNone:
			default:
				bad("interval", "%q is not one of wilson, jeffreys, none", r.Interval)
			}
		}
		if ok && !(r.Threshold >= spec.min && r.Threshold <= spec.max) {
			bad("threshold", "%g must lie between %g and %.4g", r.Threshold, spec.min, spec.max)
		}
		return e
	}
}

func (e *boundEval) beyond(x float64) bool {
	if e.ceiling {
		return x > e.r.Threshold
	}
	return x < e.r.Threshold
}

// Evaluate judges the rule's metric in the model's window.
func (e *boundEval) Evaluate(_ context.Context, in Input) ([]Finding, error) {
	r := e.r
	v, err := view(in, r.Window)
	if err != nil {
		return nil, err
	}
	classes := v.Matrix.Classes()
	idx := []int{-1}
	if e.metric.perClass {
		if idx, err = classIndexes(r, in.Model.Name, classes); err != nil {
			return nil, err
		}
	}
	var ms windows.Metrics
	if e.metric.value != nil {
		ms = v.Metrics(in.Confidence)
	}
	out := make([]Finding, 0, len(idx))
	for _, k := range idx {
		f := Finding{Model: in.Model.Name}
		if k >= 0 {
			f.Class = classes[k]
		}
		res := Result{From: v.From, To: v.To, Threshold: ptr(r.Threshold), Confidence: in.Confidence}
		if e.metric.counts != nil {
			f.Result = e.proportion(res, v, k, in.Confidence)
		} else {
			f.Result = e.point(res, ms, v, k)
		}
		out = append(out, f)
	}
	return out, nil
}

// proportion judges a proportion metric by its interval (or its point
// value with interval none).
func (e *boundEval) proportion(res Result, v windows.View, k int, conf float64) Result {
	r := e.r
	x, n := e.metric.counts(v.Matrix, v.Predicted, k)
	res.Count = n
	if n < r.MinCount {
		return unknown(res, "n=%d is below min_count %d", n, r.MinCount)
	}
	value := float64(x) / float64(n)
	res.Value = &value
	if r.Interval == IntervalNone {
		res.Outcome = outcome(e.beyond(value))
		return res
	}
	lo, hi, ok := interval(r.Interval, x, n, conf)
	if !ok {
		return unknown(res, "no interval for %d of %d", x, n)
	}
	res.Interval = &[2]float64{lo, hi}
	// The whole interval must lie beyond the threshold: the upper bound
	// below a floor, the lower bound above a ceiling.
	edge := hi
	if e.ceiling {
		edge = lo
	}
	res.Outcome = outcome(e.beyond(edge))
	return res
}

// point judges a metric that is not a proportion by its point value.
func (e *boundEval) point(res Result, ms windows.Metrics, v windows.View, k int) Result {
	r := e.r
	value, n := e.metric.value(ms, v.Matrix, max(k, 0))
	res.Count = n
	switch {
	case n < r.MinCount:
		return unknown(res, "n=%d is below min_count %d", n, r.MinCount)
	case value == nil:
		return unknown(res, "%s is undefined", r.Metric)
	}
	res.Value = value
	res.Outcome = outcome(e.beyond(*value))
	return res
}

func interval(method string, x, n int64, conf float64) (lo, hi float64, ok bool) {
	if method == IntervalJeffreys {
		return stats.Jeffreys(x, n, conf)
	}
	return stats.Wilson(x, n, conf)
}

func describeBound(a *Alert, subject string) string {
	res := a.Result
	s := fmt.Sprintf("%s of %s over %s: %s", a.Metric, subject, a.Window, num(res.Value))
	if res.Interval != nil {
		s += fmt.Sprintf(" (%g%% interval %.4g–%.4g, n=%d)", 100*res.Confidence, res.Interval[0], res.Interval[1], res.Count)
	} else {
		s += fmt.Sprintf(" (n=%d)", res.Count)
	}
	return s + fmt.Sprintf("; %s %s", a.Kind, num(res.Threshold))
}
