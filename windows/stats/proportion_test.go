package stats

import (
	"fmt"
	"math"
	"testing"
)

func TestTwoProportionNewcombe1998(t *testing.T) {
	// source: R. G. Newcombe (1998), "Interval estimation for the difference
	// between independent proportions: comparison of eleven methods",
	// Statistics in Medicine 17:873–890, worked examples of method 10 (95%).
	// Values from memory; cross-checked with statsmodels 0.13.5
	// confint_proportions_2indep(method='newcomb') by gen.py and below.
	cases := []struct {
		x1, n1, x2, n2 int64
		lo, hi         float64
	}{
		{56, 70, 48, 80, 0.0524, 0.3339},
		{9, 10, 3, 10, 0.1705, 0.8090},
		{6, 7, 2, 7, 0.0582, 0.8062},
		{5, 56, 0, 29, -0.0381, 0.1926},
		{0, 10, 0, 20, -0.1611, 0.2775},
	}
	ref := loadReference(t)
	if len(ref.NewcombeDifference) != len(cases) {
		t.Fatalf("stats.json has %d difference examples, want %d", len(ref.NewcombeDifference), len(cases))
	}
	for i, c := range cases {
		got, err := TwoProportion(c.x1, c.n1, c.x2, c.n2, 0.95)
		if err != nil || round4(got.Lo) != c.lo || round4(got.Hi) != c.hi {
			t.Errorf("TwoProportion(%d/%d, %d/%d) = %.4f–%.4f (%v), want %.4f–%.4f", c.x1, c.n1, c.x2, c.n2, got.Lo, got.Hi, err, c.lo, c.hi)
		}
		sm := ref.NewcombeDifference[i]
		if sm.X1 != c.x1 || sm.N2 != c.n2 || round4(sm.StatsmodelsNewcomb[0]) != c.lo || round4(sm.StatsmodelsNewcomb[1]) != c.hi {
			t.Errorf("statsmodels cross-check of %d/%d − %d/%d: %v", c.x1, c.n1, c.x2, c.n2, sm.StatsmodelsNewcomb)
		}
	}
}

func TestTwoProportionErrors(t *testing.T) {
	for _, c := range [][4]int64{{0, 0, 1, 2}, {1, 2, 0, 0}, {3, 2, 1, 2}, {-1, 2, 1, 2}, {1, 2, 3, 2}} {
		if _, err := TwoProportion(c[0], c[1], c[2], c[3], 0.95); err == nil {
			t.Errorf("TwoProportion%v: no error", c)
		}
	}
	if _, err := TwoProportion(1, 2, 1, 2, 1.5); err == nil {
		t.Error("confidence 1.5: no error")
	}
}

func TestTwoProportionProperties(t *testing.T) {
	for _, c := range [][4]int64{{56, 70, 48, 80}, {1, 400, 9, 380}, {0, 10, 5, 10}, {10, 10, 0, 10}} {
		name := fmt.Sprint(c)
		got, err := TwoProportion(c[0], c[1], c[2], c[3], 0.95)
		if err != nil {
			t.Fatal(err)
		}
		if !(got.Lo <= got.Diff && got.Diff <= got.Hi && got.Lo >= -1 && got.Hi <= 1) {
			t.Errorf("%s: interval [%g, %g] does not hold %g within [−1, 1]", name, got.Lo, got.Hi, got.Diff)
		}
		// The two-sided p-value is twice the smaller tail (follows from the
		// definition of the z test).
		if want := 2 * math.Min(got.PLess, 1-got.PLess); !near(got.P, want, 1e-12, 1e-15) {
			t.Errorf("%s: P = %g, want 2·min(PLess, 1−PLess) = %g", name, got.P, want)
		}
		// Swapping the samples negates the difference and mirrors the interval.
		sw, _ := TwoProportion(c[2], c[3], c[0], c[1], 0.95)
		if sw.Diff != -got.Diff || !near(sw.Lo, -got.Hi, 1e-12, 1e-15) || !near(sw.Hi, -got.Lo, 1e-12, 1e-15) {
			t.Errorf("%s swapped: %+v, original %+v", name, sw, got)
		}
	}
}
