package stats

import (
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// Wilson returns the Wilson score interval (Wilson 1927) for successes out
// of n trials at the given two-sided confidence, e.g. 0.95. It reports
// ok=false when n ≤ 0, successes lies outside [0, n] or confidence lies
// outside (0, 1).
//
// It agrees with statsmodels proportion_confint(method='wilson') but avoids
// that formula's cancellation in the lower bound, which it takes from the
// product of the two roots of Wilson's quadratic, lo·hi = p̂²/(1 + z²/n).
// So lo is exactly 0 for 0 successes and keeps its relative accuracy when
// small; hi is exactly 1 for n successes.
func Wilson(successes, n int64, confidence float64) (lo, hi float64, ok bool) {
	if n <= 0 || successes < 0 || successes > n || !validConfidence(confidence) {
		return 0, 0, false
	}
	z := critical(confidence)
	z2 := z * z
	nf := float64(n)
	p := float64(successes) / nf
	denom := 1 + z2/nf
	centre := (p + z2/(2*nf)) / denom
	half := z * math.Sqrt(p*(1-p)/nf+z2/(4*nf*nf)) / denom
	hi = centre + half
	lo = p * p / (denom * hi)
	if successes == n {
		hi = 1
	}
	return lo, hi, true
}

// Jeffreys returns the Jeffreys interval for successes out of n trials: the
// equal-tailed interval of the Beta(successes+½, n−successes+½) posterior
// (Brown, Cai & DasGupta 2001). As statsmodels 0.13 proportion_confint
// (method='jeffreys') does, it does not replace the lower bound by 0 when
// successes = 0 nor the upper bound by 1 when successes = n, a modification
// Brown et al. suggest. ok is false on the same inputs as Wilson's.
//
// Its bounds carry a relative error of up to about 5e-15·n (1e-6 at n = 1e9):
// gonum's regularised incomplete beta takes log B(a, b) as a difference of
// log-gamma values of size n·ln n and loses the corresponding digits.
func Jeffreys(successes, n int64, confidence float64) (lo, hi float64, ok bool) {
	if n <= 0 || successes < 0 || successes > n || !validConfidence(confidence) {
		return 0, 0, false
	}
	post := distuv.Beta{Alpha: float64(successes) + 0.5, Beta: float64(n-successes) + 0.5}
	alpha := 1 - confidence
	return post.Quantile(alpha / 2), post.Quantile(1 - alpha/2), true
}

// critical returns z with P(|Z| > z) = 1 − confidence for a standard normal Z.
// Taking the lower tail's quantile and negating it keeps the full precision
// of α/2, which 1 − α/2 would round away.
func critical(confidence float64) float64 {
	return -distuv.UnitNormal.Quantile((1 - confidence) / 2)
}

func validConfidence(c float64) bool { return c > 0 && c < 1 }
