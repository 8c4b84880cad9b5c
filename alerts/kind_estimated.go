package alerts

import (
	"context"
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"

	"github.com/classwatch/classwatch/windows/stats"
)

// estimatedShiftEval evaluates an estimated_prevalence_shift rule: per
// class, has the prevalence estimated from the window's predicted mix
// (black-box shift estimation against the reference's labeled matrix)
// moved away from the reference's actual prevalence by more than the
// margin, beyond the estimate's uncertainty? It needs no label in the
// window.
type estimatedShiftEval struct{ r *Rule }

func newEstimatedShift(r *Rule, bad badFunc) Evaluator {
	checkMargin(r, bad)
	return &estimatedShiftEval{r: r}
}

// Evaluate estimates the window's prevalence and tests each class.
func (e *estimatedShiftEval) Evaluate(ctx context.Context, in Input) ([]Finding, error) {
	r := e.r
	cur, ref, idx, err := classPeriods(ctx, in, r)
	if err != nil {
		return nil, err
	}
	classes := cur.m.Classes()
	nCur, nRef := sum(cur.pred), ref.m.Total()
	est, ok, err := stats.BBSE(ref.m.Dense(), cur.pred, in.Confidence)
	if err != nil {
		return nil, err
	}
	cs := make([]comparison, 0, len(idx))
	for _, k := range idx {
		res := Result{
			From: cur.from, To: cur.to, Count: nCur, Confidence: in.Confidence, Margin: ptr(r.Margin),
			Reference: &Figures{From: ref.from, To: ref.to, Count: nRef},
		}
		c := comparison{Finding: Finding{Model: in.Model.Name, Class: classes[k]}, p: math.NaN()}
		switch {
		case nCur < r.MinCount || nRef < r.MinCount:
			c.Result = unknown(res, "n=%d predictions now and %d labeled in the reference; min_count is %d", nCur, nRef, r.MinCount)
		case !ok:
			c.Result = unknown(res, "no estimate: a class has no labeled example in the reference")
		default:
			c.Result, c.p = e.test(res, est, k, ref.m.Row(k), nRef)
		}
		cs = append(cs, c)
	}
	return adjust(cs, in.Confidence), nil
}

// test compares class k's estimate with the reference prevalence x/n: the
// difference of the unclipped estimate and x/n, over the standard error
// of the two together, taken as independent (the delta method's variance
// of the estimate, with the reference matrix as a sample, plus the
// binomial variance of x/n). Both rest on the same reference examples and
// move together, so the true variance of the difference is smaller and
// the test errs towards silence. With a margin δ the null hypothesis is
// |difference| ≤ δ, and the two-sided p-value is 2·(1 − Φ((|d| − δ)/se)).
func (e *estimatedShiftEval) test(res Result, est stats.LabelShift, k int, x, n int64) (Result, float64) {
	p0 := float64(x) / float64(n)
	res.Reference.Value = ptr(p0)
	res.Value = ptr(est.Prevalence[k])
	res.Interval = &[2]float64{est.Lo[k], est.Hi[k]}
	d := est.Raw[k] - p0
	res.Difference = ptr(d)
	se := math.Sqrt(est.SE[k]*est.SE[k] + p0*(1-p0)/float64(n))
	if se == 0 {
		// A degenerate reference (one class only): any difference beyond
		// the margin is certain, none is impossible.
		p := 1.0
		if math.Abs(d) > e.r.Margin {
			p = 0
		}
		res.PValue = ptr(p)
		return res, p
	}
	z := (math.Abs(d) - e.r.Margin) / se
	p := min(1, 2*distuv.UnitNormal.Survival(z))
	res.PValue = ptr(p)
	return res, p
}

func describeEstimatedShift(a *Alert, subject string) string {
	res, ref := a.Result, refFigures(a.Result)
	s := fmt.Sprintf("estimated prevalence of %s over %s (from %d predictions, no labels): %s", subject, a.Window, res.Count, num(res.Value))
	if res.Interval != nil {
		s += fmt.Sprintf(" (%g%% interval %.4g–%.4g)", 100*res.Confidence, res.Interval[0], res.Interval[1])
	}
	return s + fmt.Sprintf(" against %s (n=%d) in the reference; p=%.3g, margin %s", num(ref.Value), ref.Count, deref(res.PValue), num(res.Margin))
}
