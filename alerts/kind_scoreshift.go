package alerts

import (
	"cmp"
	"context"
	"fmt"
	"math"
)

// scoreShiftEval evaluates a score_shift rule: per class, has the
// distribution of the class's score (fixed bins) in the window moved from
// the reference's? The figure is the Jensen–Shannon distance (Lin 1991);
// the decision is a chi-square (or G) test of homogeneity of the two
// histograms, sparse bins pooled, with Benjamini–Hochberg across the
// rule's classes, and, when threshold is set, a distance of at least it.
// It needs no label.
type scoreShiftEval struct{ r *Rule }

func scoreShiftDefaults(r *Rule) { r.Test = cmp.Or(r.Test, TestChiSquare) }

func newScoreShift(r *Rule, bad badFunc) Evaluator {
	checkTest(r, bad, "threshold", r.Threshold)
	if !(r.Threshold >= 0 && r.Threshold <= math.Sqrt(math.Ln2)) {
		bad("threshold", "%g: a Jensen–Shannon distance lies between 0 and %.4g", r.Threshold, math.Sqrt(math.Ln2))
	}
	return &scoreShiftEval{r: r}
}

// Evaluate compares each class's score histogram with the reference's.
func (e *scoreShiftEval) Evaluate(ctx context.Context, in Input) ([]Finding, error) {
	r := e.r
	cur, ref, idx, err := classPeriods(ctx, in, r)
	if err != nil {
		return nil, err
	}
	cs := make([]comparison, 0, len(idx))
	for _, k := range idx {
		c := comparison{Finding: Finding{Model: in.Model.Name, Class: cur.m.Classes()[k]}, p: math.NaN()}
		c.Result, c.p, err = e.judge(cur, ref, k, in.Confidence)
		if err != nil {
			return nil, fmt.Errorf("class %s: %w", c.Class, err)
		}
		cs = append(cs, c)
	}
	if r.Test == TestNone {
		out := make([]Finding, len(cs))
		for i, c := range cs {
			if c.Result.Outcome != OutcomeUnknown {
				c.Result.Outcome = outcome(c.Result.Value != nil && *c.Result.Value >= r.Threshold)
			}
			out[i] = c.Finding
		}
		return out, nil
	}
	out := adjust(cs, in.Confidence)
	for i := range out {
		if res := &out[i].Result; res.Outcome == OutcomeMet && (res.Value == nil || *res.Value < r.Threshold) {
			res.Outcome = OutcomeClear
		}
	}
	return out, nil
}

// judge computes class k's distance and test; p is NaN when the outcome is
// unknown or no test is made.
func (e *scoreShiftEval) judge(cur, ref period, k int, conf float64) (Result, float64, error) {
	r := e.r
	res := Result{From: cur.from, To: cur.to, Confidence: conf, Reference: &Figures{From: ref.from, To: ref.to}}
	if r.Threshold > 0 {
		res.Threshold = ptr(r.Threshold)
	}
	if cur.scores == nil || ref.scores == nil {
		return unknown(res, "the window source keeps no score aggregates"), math.NaN(), nil
	}
	a, b := cur.scores.Hist[k][:], ref.scores.Hist[k][:]
	res.Count, res.Reference.Count = sum(a), sum(b)
	if res.Count < r.MinCount || res.Reference.Count < r.MinCount {
		return unknown(res, "n=%d scored predictions now and %d in the reference; min_count is %d", res.Count, res.Reference.Count, r.MinCount), math.NaN(), nil
	}
	res.Value = cur.scores.ScoreShift(ref.scores, k)
	if r.Test == TestNone {
		return res, math.NaN(), nil
	}
	t, err := homogeneity(r.Test, a, b)
	if err != nil {
		return Result{}, 0, err
	}
	res.Statistic, res.DF, res.PValue = ptr(t.Statistic), ptr(t.DF), ptr(t.P)
	return res, t.P, nil
}

func describeScoreShift(a *Alert, subject string) string {
	res, ref := a.Result, refFigures(a.Result)
	s := fmt.Sprintf("score distribution of %s over %s against the reference (n=%d vs %d): Jensen–Shannon distance %s", subject, a.Window, res.Count, ref.Count, num(res.Value))
	if res.PValue != nil {
		s += fmt.Sprintf(", p=%.3g", *res.PValue)
	}
	return s
}
