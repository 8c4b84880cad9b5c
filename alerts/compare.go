package alerts

import (
	"math"

	"gonum.org/v1/gonum/stat/distuv"

	"github.com/classwatch/classwatch/windows/stats"
)

// proportion is x successes of n trials.
type proportion struct{ x, n int64 }

func (p proportion) value() float64 { return float64(p.x) / float64(p.n) }

// compare compares the current proportion with the reference one. The
// Comparison (difference and Newcombe interval) is current − reference.
// The p-value is one-sided, for the alternative that the current figure is
// worse than the reference by more than margin: lower when worse is
// "lower" (a recall drop), higher otherwise (a rise in a confusion share).
//
// With margin 0 the test is the pooled two-proportion z-test of
// stats.TwoProportion. With a margin δ > 0 the null hypothesis is that the
// difference is exactly −δ (or +δ), and the test is Farrington & Manning's
// (1990) score test, whose variance uses the maximum-likelihood estimates
// restricted to that null; at δ = 0 those estimates are the pooled
// proportion, so the two tests agree there.
func compare(cur, ref proportion, margin, confidence float64, lower bool) (stats.Comparison, float64, error) {
	c, err := stats.TwoProportion(cur.x, cur.n, ref.x, ref.n, confidence)
	if err != nil {
		return c, 0, err
	}
	// Write the alternative as a < b − margin.
	a, b := cur, ref
	if !lower {
		a, b = ref, cur
	}
	if margin > 0 {
		return c, scoreLess(a, b, margin), nil
	}
	if lower {
		return c, c.PLess, nil
	}
	s, err := stats.TwoProportion(a.x, a.n, b.x, b.n, confidence)
	return c, s.PLess, err
}

// scoreLess is the one-sided p-value of Farrington & Manning's score test
// of H0: p1 − p2 = −margin against H1: p1 − p2 < −margin. The restricted
// estimates solve the likelihood equations' cubic in closed form
// (Farrington & Manning 1990, Statistics in Medicine 9:1447–1454, after
// Miettinen & Nurminen 1985). It agrees with statsmodels
// test_proportions_2indep(method='score', compare='diff', correction=False,
// alternative='smaller', value=-margin).
func scoreLess(p1, p2 proportion, margin float64) float64 {
	d := -margin
	h1, h2 := p1.value(), p2.value()
	n1, n2 := float64(p1.n), float64(p2.n)
	theta := n2 / n1
	a := 1 + theta
	b := -(1 + theta + h1 + theta*h2 + d*(theta+2))
	c := d*d + d*(2*h1+theta+1) + h1 + theta*h2
	e := -h1 * d * (1 + d)
	v := b*b*b/(27*a*a*a) - b*c/(6*a*a) + e/(2*a)
	u := math.Sqrt(max(b*b/(9*a*a)-c/(3*a), 0))
	if v < 0 {
		u = -u
	}
	var r1 float64
	if u == 0 {
		r1 = -b / (3 * a)
	} else {
		w := (math.Pi + math.Acos(max(-1, min(1, v/(u*u*u))))) / 3
		r1 = 2*u*math.Cos(w) - b/(3*a)
	}
	r1 = max(0, min(1, r1))
	r2 := max(0, min(1, r1-d))
	variance := r1*(1-r1)/n1 + r2*(1-r2)/n2
	if !(variance > 0) {
		return 1
	}
	z := (h1 - h2 - d) / math.Sqrt(variance)
	return distuv.UnitNormal.CDF(z)
}
