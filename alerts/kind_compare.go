package alerts

import (
	"context"
	"fmt"
	"math"
	"slices"

	"github.com/classwatch/classwatch/windows/stats"
)

// checkMargin checks the margin of drop and confusion_rise rules.
func checkMargin(r *Rule, bad badFunc) {
	if !(r.Margin >= 0 && r.Margin < 1) {
		bad("margin", "%g must lie in [0, 1)", r.Margin)
	}
}

// dropEval evaluates a drop rule: per class, is the current figure lower
// than the reference's by more than the margin?
type dropEval struct {
	r      *Rule
	metric metricSpec
}

func newDrop(r *Rule, bad badFunc) Evaluator {
	e := &dropEval{r: r}
	switch r.Metric {
	case "recall", "precision", "specificity":
		e.metric = metricSpecs[r.Metric]
	default:
		bad("metric", "%q: a drop rule compares recall, precision or specificity", r.Metric)
	}
	checkMargin(r, bad)
	return e
}

// Evaluate compares each of the rule's classes with the reference.
func (e *dropEval) Evaluate(ctx context.Context, in Input) ([]Finding, error) {
	r := e.r
	cur, ref, idx, err := classPeriods(ctx, in, r)
	if err != nil {
		return nil, err
	}
	classes := cur.m.Classes()
	var cs []comparison
	for _, k := range idx {
		x1, n1 := e.metric.counts(cur.m, cur.pred, k)
		x2, n2 := e.metric.counts(ref.m, ref.pred, k)
		c, err := compareOne(r, cur, ref, proportion{x1, n1}, proportion{x2, n2}, in.Confidence, true)
		if err != nil {
			return nil, fmt.Errorf("class %s: %w", classes[k], err)
		}
		c.Model, c.Class = in.Model.Name, classes[k]
		cs = append(cs, c)
	}
	return adjust(cs, in.Confidence), nil
}

// confusionRiseEval evaluates a confusion_rise rule: per (actual,
// predicted) pair, did the share of actual predicted as predicted rise by
// more than the margin?
type confusionRiseEval struct{ r *Rule }

func newConfusionRise(r *Rule, bad badFunc) Evaluator {
	for _, p := range r.Pairs {
		switch {
		case p.Actual == "" || p.Predicted == "":
			bad("pairs", "each pair needs actual and predicted")
		case p.Actual == p.Predicted:
			bad("pairs", "%s→%s is on the diagonal; confusion_rise watches errors", p.Actual, p.Predicted)
		}
	}
	checkMargin(r, bad)
	return &confusionRiseEval{r: r}
}

// Evaluate compares each watched cell's share with the reference.
func (e *confusionRiseEval) Evaluate(ctx context.Context, in Input) ([]Finding, error) {
	r := e.r
	cur, ref, err := periods(ctx, in, r)
	if err != nil {
		return nil, err
	}
	classes := cur.m.Classes()
	pairs, err := e.pairs(in.Model.Name, classes)
	if err != nil {
		return nil, err
	}
	var cs []comparison
	for _, pr := range pairs {
		x1, n1 := cur.m.At(pr[0], pr[1]), cur.m.Row(pr[0])
		x2, n2 := ref.m.At(pr[0], pr[1]), ref.m.Row(pr[0])
		c, err := compareOne(r, cur, ref, proportion{x1, n1}, proportion{x2, n2}, in.Confidence, false)
		if err != nil {
			return nil, fmt.Errorf("pair %s→%s: %w", classes[pr[0]], classes[pr[1]], err)
		}
		c.Model, c.Class, c.Predicted = in.Model.Name, classes[pr[0]], classes[pr[1]]
		cs = append(cs, c)
	}
	return adjust(cs, in.Confidence), nil
}

// pairs returns the (actual, predicted) indexes the rule watches: its
// pairs, or every off-diagonal cell.
func (e *confusionRiseEval) pairs(model string, classes []string) ([][2]int, error) {
	r := e.r
	var pairs [][2]int
	if len(r.Pairs) == 0 {
		for a := range classes {
			for p := range classes {
				if a != p {
					pairs = append(pairs, [2]int{a, p})
				}
			}
		}
	}
	for _, pr := range r.Pairs {
		a, p := slices.Index(classes, pr.Actual), slices.Index(classes, pr.Predicted)
		if a < 0 || p < 0 {
			if r.Model == AllModels {
				continue
			}
			return nil, fmt.Errorf("pair %s→%s names a class model %s lacks", pr.Actual, pr.Predicted, model)
		}
		pairs = append(pairs, [2]int{a, p})
	}
	return pairs, nil
}

// comparison is one instance of a drop or confusion_rise rule before the
// Benjamini–Hochberg step.
type comparison struct {
	Finding
	p float64
}

// compareOne builds one comparison's result; an instance below the
// minimum count gets an unknown outcome and p = NaN.
func compareOne(r *Rule, cur, ref period, c, b proportion, conf float64, lower bool) (comparison, error) {
	res := Result{
		From: cur.from, To: cur.to, Count: c.n, Confidence: conf, Margin: ptr(r.Margin),
		Reference: &Figures{From: ref.from, To: ref.to, Count: b.n},
	}
	if c.n > 0 {
		res.Value = ptr(c.value())
	}
	if b.n > 0 {
		res.Reference.Value = ptr(b.value())
	}
	if c.n < r.MinCount || b.n < r.MinCount {
		return comparison{Finding: Finding{Result: unknown(res, "n=%d now and %d in the reference; min_count is %d", c.n, b.n, r.MinCount)}, p: math.NaN()}, nil
	}
	cmpr, p, err := compare(c, b, r.Margin, conf, lower)
	if err != nil {
		return comparison{}, err
	}
	lo, hi, _ := stats.Wilson(c.x, c.n, conf)
	res.Interval = &[2]float64{lo, hi}
	res.Difference = ptr(cmpr.Diff)
	res.DifferenceInterval = &[2]float64{cmpr.Lo, cmpr.Hi}
	res.PValue = ptr(p)
	return comparison{Finding: Finding{Result: res}, p: p}, nil
}

// adjust decides the comparisons of one rule and model together with the
// Benjamini–Hochberg procedure at q = 1 − confidence; unknown ones (p NaN)
// are left out of the family.
func adjust(cs []comparison, conf float64) []Finding {
	ps := make([]float64, 0, len(cs))
	judged := make([]int, 0, len(cs))
	for i, c := range cs {
		if c.Result.Outcome != OutcomeUnknown {
			ps = append(ps, c.p)
			judged = append(judged, i)
		}
	}
	reject := stats.BenjaminiHochberg(ps, 1-conf)
	for j, i := range judged {
		cs[i].Result.Outcome = outcome(reject[j])
	}
	out := make([]Finding, len(cs))
	for i, c := range cs {
		out[i] = c.Finding
	}
	return out
}

func describeDrop(a *Alert, subject string) string {
	res, ref := a.Result, refFigures(a.Result)
	return fmt.Sprintf("%s of %s over %s: %s (n=%d) against %s (n=%d) in the reference; one-sided p=%.3g, margin %s",
		a.Metric, subject, a.Window, num(res.Value), res.Count, num(ref.Value), ref.Count, deref(res.PValue), num(res.Margin))
}

func describeConfusionRise(a *Alert, _ string) string {
	res, ref := a.Result, refFigures(a.Result)
	return fmt.Sprintf("share of %s predicted as %s on %s over %s: %s (n=%d) against %s (n=%d) in the reference; one-sided p=%.3g, margin %s",
		a.Class, a.Predicted, a.Model, a.Window, num(res.Value), res.Count, num(ref.Value), ref.Count, deref(res.PValue), num(res.Margin))
}

// refFigures returns the result's reference figures, zero when absent.
func refFigures(res Result) Figures {
	if res.Reference != nil {
		return *res.Reference
	}
	return Figures{}
}
