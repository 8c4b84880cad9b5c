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
// With margin 0 the test is Fisher's exact test, one-sided. The pooled
// z-test of stats.TwoProportion would be simpler, but a proportion near 1,
// such as a good recall, has a long lower tail, and there the z-test fires
// too often: about 5.3% at a nominal 5% for a recall of 0.8 on 100
// examples against 1,000, 6.7% for 0.95 on 34 (our simulation, 200,000
// draws each). The exact test never exceeds the level, whatever the
// recall and the counts; the price, a little power lost to discreteness,
// is small at the counts alerts are judged on (TestSensitivity).
//
// With a margin δ > 0 the null hypothesis is that the difference is exactly
// −δ (or +δ); no conditional test exists for it, and the test is Farrington
// & Manning's (1990) score test, whose variance uses the maximum-likelihood
// estimates restricted to that null. A stream with no change at all lies δ
// away from that null, so a margin only lowers its false alarms.
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
	return c, fisherLess(a, b), nil
}

// fisherLess is the one-sided p-value of Fisher's exact test of
// H0: p1 = p2 against H1: p1 < p2. Given the total successes K = x1 + x2,
// the successes X of sample 1 are hypergeometric (N = n1 + n2 trials, K
// successes, n1 draws), and the p-value is P(X ≤ x1). It agrees with
// scipy.stats.fisher_exact(alternative='less').
func fisherLess(p1, p2 proportion) float64 {
	n := p1.n + p2.n
	k := p1.x + p2.x
	draws, x := p1.n, p1.x
	lo, hi := max(0, k-p2.n), min(draws, k)
	if lo == hi {
		return 1 // one possible table: nothing speaks for a difference
	}
	lchoose := func(a, b int64) float64 {
		la, _ := math.Lgamma(float64(a + 1))
		lb, _ := math.Lgamma(float64(b + 1))
		lc, _ := math.Lgamma(float64(a - b + 1))
		return la - lb - lc
	}
	at := math.Exp(lchoose(k, x) + lchoose(n-k, draws-x) - lchoose(n, draws))
	// Sum the tail on the far side of x from the mode, where the terms fall
	// off geometrically, by the ratio of neighbouring terms; the other tail
	// is its complement.
	mode := (draws + 1) * (k + 1) / (n + 2)
	var tail float64
	if x <= mode {
		for i, t := x, at; i > lo && t > 0; i-- {
			t *= float64(i) * float64(n-k-draws+i) / (float64(k-i+1) * float64(draws-i+1))
			tail += t
			if t < 1e-18*tail {
				break
			}
		}
		return tail + at
	}
	for i, t := x, at; i < hi && t > 0; i++ {
		t *= float64(k-i) * float64(draws-i) / (float64(i+1) * float64(n-k-draws+i+1))
		tail += t
		if t < 1e-18*tail {
			break
		}
	}
	return 1 - tail
}

// scoreLess is the one-sided p-value of Farrington & Manning's score test
// of H0: p1 − p2 = −margin against H1: p1 − p2 < −margin. The restricted
// estimates solve the likelihood equations' cubic in closed form
// (Farrington & Manning 1990, Statistics in Medicine 9:1447–1454, after
// Miettinen & Nurminen 1985); the variance has no n/(n−1) factor. The
// golden values solve the likelihood equation with scipy.optimize instead
// of taking statsmodels 0.13.5's test_proportions_2indep(method='score'),
// whose restricted estimates do not maximise the likelihood (see
// testdata/gen.py).
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
