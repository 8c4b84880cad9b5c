package stats

import (
	"errors"
	"fmt"
	"math"
)

// PSI returns the population stability index of actual against expected,
// two count vectors over the same bins: Σ (aᵢ − eᵢ)·ln(aᵢ/eᵢ), where aᵢ and
// eᵢ are each vector's shares. An empty bin's share is replaced by epsilon
// (e.g. 1e-4; the shares are not renormalised afterwards), which keeps the
// logarithm finite and bounds what one empty bin can contribute.
//
// It returns an error when the vectors differ in length or are empty, hold a
// negative count, either sums to zero, or epsilon lies outside (0, 1).
func PSI(expected, actual []int64, epsilon float64) (float64, error) {
	if err := checkCounts(expected, actual); err != nil {
		return 0, fmt.Errorf("compute PSI: %w", err)
	}
	if !(epsilon > 0 && epsilon < 1) {
		return 0, fmt.Errorf("compute PSI: epsilon %g outside (0, 1)", epsilon)
	}
	var te, ta int64
	for i := range expected {
		te += expected[i]
		ta += actual[i]
	}
	if te == 0 || ta == 0 {
		return 0, errors.New("compute PSI: a vector has no counts")
	}
	share := func(c, total int64) float64 {
		if c == 0 {
			return epsilon
		}
		return float64(c) / float64(total)
	}
	var psi float64
	for i := range expected {
		e, a := share(expected[i], te), share(actual[i], ta)
		psi += (a - e) * math.Log(a/e)
	}
	return psi, nil
}

// JensenShannon returns the Jensen–Shannon distance between p and q, the
// square root of their Jensen–Shannon divergence with natural logarithms,
// so it lies in [0, √ln 2]. Both are normalised to sum to one first. It
// agrees with scipy.spatial.distance.jensenshannon with its default base.
//
// It returns an error when p and q differ in length or are empty, hold a
// negative or non-finite weight, or either sums to zero.
func JensenShannon(p, q []float64) (float64, error) {
	if len(p) != len(q) {
		return 0, fmt.Errorf("compute Jensen-Shannon distance: lengths differ (%d and %d)", len(p), len(q))
	}
	if len(p) == 0 {
		return 0, errors.New("compute Jensen-Shannon distance: empty distributions")
	}
	var sp, sq float64
	for i := range p {
		if !(p[i] >= 0 && q[i] >= 0) || math.IsInf(p[i], 0) || math.IsInf(q[i], 0) {
			return 0, fmt.Errorf("compute Jensen-Shannon distance: weight %d is negative or not finite", i)
		}
		sp += p[i]
		sq += q[i]
	}
	if !(sp > 0 && sq > 0) || math.IsInf(sp, 0) || math.IsInf(sq, 0) {
		return 0, errors.New("compute Jensen-Shannon distance: weights must have a positive finite sum")
	}
	var left, right float64
	for i := range p {
		pi, qi := p[i]/sp, q[i]/sq
		m := (pi + qi) / 2
		left += relEntr(pi, m)
		right += relEntr(qi, m)
	}
	// The two sums hold terms of both signs, so for nearly equal inputs
	// rounding can leave a tiny negative divergence; it is zero.
	return math.Sqrt(max(left+right, 0) / 2), nil
}

// relEntr is x·ln(x/y), with 0·ln(0/y) = 0 (y > 0 whenever x > 0 here).
func relEntr(x, y float64) float64 {
	if x == 0 {
		return 0
	}
	return x * math.Log(x/y)
}
