package stats

import (
	"cmp"
	"math"
	"slices"
)

// BenjaminiHochberg reports which of the hypotheses with p-values p are
// rejected when the false discovery rate is controlled at level q
// (Benjamini & Hochberg 1995): with the p-values sorted ascending, every
// hypothesis up to the largest rank i with p₍ᵢ₎ ≤ (i/m)·q is rejected. The
// result is in the order of p. It agrees with statsmodels
// multipletests(method='fdr_bh'). A NaN p-value is never rejected but still
// counts towards m.
func BenjaminiHochberg(p []float64, q float64) []bool {
	m := len(p)
	order := make([]int, m)
	for i := range order {
		order[i] = i
	}
	key := func(i int) float64 {
		if math.IsNaN(p[i]) {
			return math.Inf(1)
		}
		return p[i]
	}
	slices.SortStableFunc(order, func(i, j int) int { return cmp.Compare(key(i), key(j)) })
	last := -1
	for r, i := range order {
		// (rank/m)·q in this order, as statsmodels computes it, so that a
		// p-value on the boundary gets the same decision.
		if key(i) <= float64(r+1)/float64(m)*q {
			last = r
		}
	}
	reject := make([]bool, m)
	for _, i := range order[:last+1] {
		reject[i] = true
	}
	return reject
}
