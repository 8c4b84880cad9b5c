package stats

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// Test is the outcome of a test of homogeneity.
type Test struct {
	// Statistic is the test statistic (Pearson's X² or the G statistic).
	Statistic float64
	// DF is the degrees of freedom: the categories kept, minus one.
	DF int
	// P is the upper-tail probability of Statistic under the chi-square
	// distribution with DF degrees of freedom.
	P float64
}

// ChiSquare tests whether two count vectors over the same categories (the
// rows of a 2×k table) come from one distribution, with Pearson's X² and no
// continuity correction. Categories where both counts are zero carry no
// information and are dropped before the degrees of freedom are counted;
// when fewer than two categories remain, the result is X² = 0, DF = 0,
// P = 1. It agrees with scipy.stats.chi2_contingency(correction=False) on
// the table with those categories removed.
//
// It returns an error when the vectors differ in length or are empty, hold a
// negative count, or when either vector sums to zero.
func ChiSquare(a, b []int64) (Test, error) {
	return homogeneity(a, b, func(o, e float64) float64 {
		d := o - e
		return d * d / e
	})
}

// GTest is ChiSquare with the log-likelihood ratio statistic
// G = 2·Σ O·ln(O/E) (cells with O = 0 add nothing) in place of X². It
// agrees with scipy.stats.chi2_contingency(correction=False,
// lambda_='log-likelihood').
func GTest(a, b []int64) (Test, error) {
	return homogeneity(a, b, func(o, e float64) float64 {
		if o == 0 {
			return 0
		}
		return 2 * o * math.Log(o/e)
	})
}

// homogeneity sums term(observed, expected) over the 2×k table of a and b
// in row-major order, the order scipy sums in.
func homogeneity(a, b []int64, term func(o, e float64) float64) (Test, error) {
	if err := checkCounts(a, b); err != nil {
		return Test{}, fmt.Errorf("test homogeneity: %w", err)
	}
	var ta, tb int64
	keep := make([]int, 0, len(a))
	for i := range a {
		ta += a[i]
		tb += b[i]
		if a[i] != 0 || b[i] != 0 {
			keep = append(keep, i)
		}
	}
	if ta == 0 || tb == 0 {
		return Test{}, errors.New("test homogeneity: a sample has no counts")
	}
	if len(keep) < 2 {
		return Test{Statistic: 0, DF: 0, P: 1}, nil
	}
	n := float64(ta + tb)
	var stat float64
	for _, row := range [2]struct {
		counts []int64
		total  float64
	}{{a, float64(ta)}, {b, float64(tb)}} {
		for _, i := range keep {
			e := row.total * float64(a[i]+b[i]) / n
			stat += term(float64(row.counts[i]), e)
		}
	}
	df := len(keep) - 1
	return Test{
		Statistic: stat,
		DF:        df,
		P:         distuv.ChiSquared{K: float64(df)}.Survival(stat),
	}, nil
}

// checkCounts reports vectors of different or zero length and negative counts.
func checkCounts(a, b []int64) error {
	if len(a) != len(b) {
		return fmt.Errorf("count vectors differ in length (%d and %d)", len(a), len(b))
	}
	if len(a) == 0 {
		return errors.New("count vectors are empty")
	}
	for i := range a {
		if a[i] < 0 || b[i] < 0 {
			return fmt.Errorf("negative count in category %d", i)
		}
	}
	return nil
}
