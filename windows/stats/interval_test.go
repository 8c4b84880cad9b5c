package stats

import (
	"math"
	"testing"
)

// round4 rounds to 4 decimals, the precision of the published tables.
func round4(x float64) float64 { return math.Round(x*1e4) / 1e4 }

func TestWilsonNewcombe1998(t *testing.T) {
	// source: R. G. Newcombe (1998), "Two-sided confidence intervals for the
	// single proportion: comparison of seven methods", Statistics in Medicine
	// 17:857–872, worked examples of the Wilson score interval (95%). Values
	// from memory; cross-checked with statsmodels 0.13.5
	// proportion_confint(method='wilson') by gen.py and below.
	cases := []struct {
		x, n   int64
		lo, hi float64
	}{
		{81, 263, 0.2553, 0.3662},
		{15, 148, 0.0624, 0.1605},
		{0, 20, 0.0000, 0.1611},
		{1, 29, 0.0061, 0.1718},
	}
	ref := loadReference(t)
	if len(ref.Newcombe) != len(cases) {
		t.Fatalf("stats.json has %d Newcombe examples, want %d", len(ref.Newcombe), len(cases))
	}
	for i, c := range cases {
		lo, hi, ok := Wilson(c.x, c.n, 0.95)
		if !ok || round4(lo) != c.lo || round4(hi) != c.hi {
			t.Errorf("Wilson(%d, %d, 0.95) = %.4f–%.4f (ok %v), want %.4f–%.4f", c.x, c.n, lo, hi, ok, c.lo, c.hi)
		}
		sm := ref.Newcombe[i]
		if sm.X != c.x || sm.N != c.n || round4(sm.StatsmodelsWilson[0]) != c.lo || round4(sm.StatsmodelsWilson[1]) != c.hi {
			t.Errorf("statsmodels cross-check of %d/%d: %v, want %.4f–%.4f", c.x, c.n, sm.StatsmodelsWilson, c.lo, c.hi)
		}
	}
}

func TestWilsonInvalid(t *testing.T) {
	for _, c := range []struct {
		x, n int64
		conf float64
	}{
		{0, 0, 0.95}, {1, 0, 0.95}, {-1, 10, 0.95}, {11, 10, 0.95},
		{5, 10, 0}, {5, 10, 1}, {5, 10, -0.5}, {5, 10, math.NaN()},
	} {
		if _, _, ok := Wilson(c.x, c.n, c.conf); ok {
			t.Errorf("Wilson(%d, %d, %g) ok, want not ok", c.x, c.n, c.conf)
		}
		if _, _, ok := Jeffreys(c.x, c.n, c.conf); ok {
			t.Errorf("Jeffreys(%d, %d, %g) ok, want not ok", c.x, c.n, c.conf)
		}
	}
}

func TestWilsonProperties(t *testing.T) {
	for _, n := range []int64{1, 2, 7, 30, 1000, 1 << 40} {
		for _, x := range []int64{0, 1, n / 3, n / 2, n - 1, n} {
			if x < 0 || x > n {
				continue
			}
			p := float64(x) / float64(n)
			prevLo, prevHi := p, p
			for _, conf := range []float64{0.5, 0.8, 0.9, 0.95, 0.99, 0.999999} {
				lo, hi, ok := Wilson(x, n, conf)
				if !ok {
					t.Fatalf("Wilson(%d, %d, %g) not ok", x, n, conf)
				}
				// The interval holds the estimate and widens with confidence
				// (follows from the definition).
				if !(0 <= lo && lo <= p && p <= hi && hi <= 1) {
					t.Errorf("Wilson(%d, %d, %g) = [%g, %g] does not hold %g within [0, 1]", x, n, conf, lo, hi, p)
				}
				if lo > prevLo || hi < prevHi {
					t.Errorf("Wilson(%d, %d, %g) = [%g, %g] narrower than at lower confidence [%g, %g]", x, n, conf, lo, hi, prevLo, prevHi)
				}
				prevLo, prevHi = lo, hi
				// Exact ends: the score interval of 0 successes starts at 0
				// and that of n successes ends at 1.
				if x == 0 && lo != 0 {
					t.Errorf("Wilson(0, %d, %g) lower = %g, want 0", n, conf, lo)
				}
				if x == n && hi != 1 {
					t.Errorf("Wilson(%d, %d, %g) upper = %g, want 1", n, n, conf, hi)
				}
				// Swapping successes and failures mirrors the interval.
				mlo, mhi, _ := Wilson(n-x, n, conf)
				if !near(mlo, 1-hi, 1e-12, 1e-15) || !near(mhi, 1-lo, 1e-12, 1e-15) {
					t.Errorf("Wilson(%d, %d, %g) = [%g, %g], mirror [%g, %g]", x, n, conf, lo, hi, mlo, mhi)
				}
			}
		}
	}
}
