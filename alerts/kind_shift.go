package alerts

import (
	"cmp"
	"context"
	"fmt"

	"github.com/classwatch/classwatch/windows/stats"
)

// psiEpsilon replaces the share of an empty class in PSI.
const psiEpsilon = 1e-4

// minExpected is the least expected count per category of a chi-square or
// G test; sparser categories are pooled first. Cochran's rule of thumb
// (common practice): the chi-square approximation is poor below about 5.
const minExpected = 5

var shiftKeys = []string{"reference", "test", "psi_threshold"}

func shiftDefaults(r *Rule) { r.Test = cmp.Or(r.Test, TestChiSquare) }

// shiftEval evaluates a prevalence_shift (actual classes) or output_shift
// (predicted classes) rule.
type shiftEval struct {
	r      *Rule
	actual bool
}

// newShift returns the constructor of prevalence_shift (actual true) or
// output_shift rules.
func newShift(actual bool) func(r *Rule, bad badFunc) Evaluator {
	return func(r *Rule, bad badFunc) Evaluator {
		checkTest(r, bad, "psi_threshold", r.PSIThreshold)
		if r.PSIThreshold < 0 {
			bad("psi_threshold", "must not be negative")
		}
		return &shiftEval{r: r, actual: actual}
	}
}

// Evaluate compares the window's class mix with the reference's.
func (e *shiftEval) Evaluate(ctx context.Context, in Input) ([]Finding, error) {
	r := e.r
	cur, ref, err := periods(ctx, in, r)
	if err != nil {
		return nil, err
	}
	var a, b []int64
	if e.actual {
		a, b = rows(cur.m), rows(ref.m)
	} else {
		a, b = cur.pred, ref.pred
	}
	ta, tb := sum(a), sum(b)
	res := Result{From: cur.from, To: cur.to, Count: ta, Confidence: in.Confidence, Reference: &Figures{From: ref.from, To: ref.to, Count: tb}}
	if r.PSIThreshold > 0 {
		res.Threshold = ptr(r.PSIThreshold)
	}
	f := Finding{Model: in.Model.Name}
	if ta < r.MinCount || tb < r.MinCount {
		f.Result = unknown(res, "n=%d now and %d in the reference; min_count is %d", ta, tb, r.MinCount)
		return []Finding{f}, nil
	}
	psi, err := stats.PSI(b, a, psiEpsilon)
	if err != nil {
		return nil, err
	}
	res.PSI, res.Value = ptr(psi), ptr(psi)
	met := r.PSIThreshold == 0 || psi >= r.PSIThreshold
	if r.Test != TestNone {
		t, err := homogeneity(r.Test, a, b)
		if err != nil {
			return nil, err
		}
		res.Statistic, res.DF, res.PValue = ptr(t.Statistic), ptr(t.DF), ptr(t.P)
		met = met && t.P <= 1-in.Confidence
	}
	res.Outcome = outcome(met)
	f.Result = res
	return []Finding{f}, nil
}

// checkTest checks the test of a rule comparing two distributions; with
// test none, the setting key (its value threshold) must decide alone.
func checkTest(r *Rule, bad badFunc, key string, threshold float64) {
	switch r.Test {
	case TestChiSquare, TestG:
	case TestNone:
		if threshold == 0 {
			bad(key, "required when test is none")
		}
	default:
		bad("test", "%q is not one of chi_square, g_test, none", r.Test)
	}
}

// homogeneity tests whether counts a and b come from one distribution,
// by the chi-square (TestChiSquare) or G test, sparse categories pooled.
func homogeneity(test string, a, b []int64) (stats.Test, error) {
	pa, pb := poolSparse(a, b)
	if test == TestG {
		return stats.GTest(pa, pb)
	}
	return stats.ChiSquare(pa, pb)
}

// poolSparse merges the categories whose expected count in either sample
// would fall below minExpected into one pooled category, so that the
// chi-square approximation holds; when the pool itself stays that sparse
// it is merged into the largest remaining category.
func poolSparse(a, b []int64) ([]int64, []int64) {
	ta, tb := float64(sum(a)), float64(sum(b))
	n := ta + tb
	sparse := func(x, y int64) bool {
		col := float64(x + y)
		return col*min(ta, tb)/n < minExpected
	}
	var pa, pb []int64
	var sa, sb int64
	pooled := false
	for i := range a {
		if a[i]+b[i] > 0 && sparse(a[i], b[i]) {
			sa, sb, pooled = sa+a[i], sb+b[i], true
			continue
		}
		pa, pb = append(pa, a[i]), append(pb, b[i])
	}
	if !pooled {
		return pa, pb
	}
	if !sparse(sa, sb) || len(pa) == 0 {
		return append(pa, sa), append(pb, sb)
	}
	big := 0
	for i := range pa {
		if pa[i]+pb[i] > pa[big]+pb[big] {
			big = i
		}
	}
	pa[big] += sa
	pb[big] += sb
	return pa, pb
}

// describeShift returns the summary of a shift rule watching what.
func describeShift(what string) func(a *Alert, subject string) string {
	return func(a *Alert, _ string) string {
		res, ref := a.Result, refFigures(a.Result)
		s := fmt.Sprintf("%s of %s over %s against the reference (n=%d vs %d):", what, a.Model, a.Window, res.Count, ref.Count)
		if res.PValue != nil {
			s += fmt.Sprintf(" p=%.3g", *res.PValue)
		}
		return s + fmt.Sprintf(" PSI=%s", num(res.PSI))
	}
}
