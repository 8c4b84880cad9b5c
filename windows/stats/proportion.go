package stats

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// Comparison compares two independent proportions p1 = x1/n1 and p2 = x2/n2.
type Comparison struct {
	// P1 and P2 are the observed proportions x1/n1 and x2/n2.
	P1, P2 float64
	// Diff is p1 − p2.
	Diff float64
	// Lo and Hi bound Diff: Newcombe's (1998) hybrid score interval (his
	// method 10), built from the Wilson interval of each proportion.
	Lo, Hi float64
	// Z is the score statistic (p1 − p2) / √(p̄(1−p̄)(1/n1 + 1/n2)), with p̄
	// the pooled proportion (x1+x2)/(n1+n2).
	Z float64
	// P is the two-sided p-value of Z against p1 = p2; PLess the one-sided
	// p-value for the alternative p1 < p2 ("the recall dropped", with the
	// current window as sample 1 and the baseline as sample 2).
	P, PLess float64
}

// TwoProportion compares x1 successes of n1 trials with x2 of n2 at the given
// two-sided confidence. The interval agrees with statsmodels
// confint_proportions_2indep(method='newcomb', compare='diff'); Z, P and
// PLess with statsmodels proportions_ztest (pooled variance, alternative
// 'two-sided' and 'smaller').
//
// When the pooled proportion is 0 or 1 both samples are all failures or all
// successes, Z is 0/0, and nothing speaks for a difference: TwoProportion
// then reports Z = 0 and P = PLess = 1 (statsmodels reports NaN).
//
// It returns an error when n1 or n2 is not positive, a count lies outside
// [0, n], or confidence lies outside (0, 1).
func TwoProportion(x1, n1, x2, n2 int64, confidence float64) (Comparison, error) {
	lo1, hi1, ok1 := Wilson(x1, n1, confidence)
	lo2, hi2, ok2 := Wilson(x2, n2, confidence)
	if !ok1 || !ok2 {
		return Comparison{}, fmt.Errorf("compare proportions %d/%d and %d/%d at confidence %g: invalid counts or confidence", x1, n1, x2, n2, confidence)
	}
	c := Comparison{P1: float64(x1) / float64(n1), P2: float64(x2) / float64(n2)}
	c.Diff = c.P1 - c.P2
	c.Lo = c.Diff - math.Hypot(c.P1-lo1, hi2-c.P2)
	c.Hi = c.Diff + math.Hypot(c.P2-lo2, hi1-c.P1)

	pooled := float64(x1+x2) / float64(n1+n2)
	if pooled == 0 || pooled == 1 {
		c.P, c.PLess = 1, 1
		return c, nil
	}
	c.Z = c.Diff / math.Sqrt(pooled*(1-pooled)*(1/float64(n1)+1/float64(n2)))
	c.P = 2 * distuv.UnitNormal.CDF(-math.Abs(c.Z))
	c.PLess = distuv.UnitNormal.CDF(c.Z)
	return c, nil
}
