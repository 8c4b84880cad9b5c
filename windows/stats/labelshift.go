package stats

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// LabelShift is a black-box shift estimate of a window's class prevalence.
type LabelShift struct {
	// Prevalence is the estimate: the least-squares solution with negative
	// components set to 0, renormalised to sum to 1.
	Prevalence []float64
	// Raw is the minimum-norm least-squares solution before clipping.
	Raw []float64
	// SE is each component's delta-method standard error.
	SE []float64
	// Lo and Hi bound each component's interval (see BBSE).
	Lo, Hi []float64
}

// BBSE estimates the class prevalence q of a window from the predicted
// classes alone, by black-box shift estimation (Lipton, Wang & Smola 2018,
// "Detecting and Correcting for Label Shift with Black Box Predictors").
// ref[i][j] counts a reference period's labeled predictions of class j
// whose actual class is i; current[j] counts all of the window's
// predictions of class j. With M[j][i] = ref[i][j] / Σ_j ref[i][j] (the
// reference's P(predicted j | actual i), assumed unchanged) and μ the
// window's predicted shares, it solves M·q = μ by minimum-norm least
// squares, as numpy.linalg.lstsq does: singular values at most
// ε·k·σ_max (ε the float64 machine epsilon) count as zero. Negative
// components are set to 0 and q is renormalised to sum to 1.
//
// The interval is the delta method's, chosen over a bootstrap because it
// is closed-form and costs one k×k pseudo-inverse per window, where a
// bootstrap would cost hundreds per scrape. To first order
// q̂ − q ≈ M⁺(μ̂ − μ) − M⁺(M̂ − M)q, with μ̂ multinomial over the window's
// N predictions and each column of M̂ multinomial over the reference's n_i
// examples of class i, all independent, so
//
//	Cov(q̂) ≈ M⁺ [ (diag μ − μμᵀ)/N + Σ_i q_i² (diag m_i − m_i m_iᵀ)/n_i ] M⁺ᵀ
//
// with m_i the i-th column of M and q the estimate. Each class's interval
// is Raw ± z·SE at the given confidence, clipped to [0, 1] and widened to
// hold the estimate when renormalising moved it. It treats the reference
// matrix as a sample, not as known, which matters when the reference is
// small.
//
// ok is false when the estimate is undefined: a class has no labeled
// example in the reference (M's column would be undefined) or the window
// has no prediction. An error reports malformed input (shapes, negative
// counts, a confidence outside (0, 1)).
func BBSE(ref [][]int64, current []int64, confidence float64) (est LabelShift, ok bool, err error) {
	k := len(current)
	if err := checkShiftInput(ref, current, confidence); err != nil {
		return LabelShift{}, false, err
	}
	support := make([]float64, k)
	var n float64
	for i := range k {
		for j := range k {
			support[i] += float64(ref[i][j])
		}
		n += float64(current[i])
	}
	for i := range k {
		if support[i] == 0 {
			return LabelShift{}, false, nil
		}
	}
	if n == 0 {
		return LabelShift{}, false, nil
	}
	m := mat.NewDense(k, k, nil)
	mu := mat.NewVecDense(k, nil)
	for i := range k {
		for j := range k {
			m.Set(j, i, float64(ref[i][j])/support[i])
		}
		mu.SetVec(i, float64(current[i])/n)
	}
	pinv, err := pseudoInverse(m)
	if err != nil {
		return LabelShift{}, false, err
	}
	var raw mat.VecDense
	raw.MulVec(pinv, mu)
	est.Raw = make([]float64, k)
	est.Prevalence = make([]float64, k)
	var total float64
	for i := range k {
		est.Raw[i] = raw.AtVec(i)
		est.Prevalence[i] = max(est.Raw[i], 0)
		total += est.Prevalence[i]
	}
	if total == 0 {
		return LabelShift{}, false, nil
	}
	for i := range k {
		est.Prevalence[i] /= total
	}
	est.SE = deltaSE(m, mu, pinv, est.Prevalence, support, n)
	z := critical(confidence)
	est.Lo, est.Hi = make([]float64, k), make([]float64, k)
	for i := range k {
		est.Lo[i] = min(max(est.Raw[i]-z*est.SE[i], 0), est.Prevalence[i])
		est.Hi[i] = max(min(est.Raw[i]+z*est.SE[i], 1), est.Prevalence[i])
	}
	return est, true, nil
}

func checkShiftInput(ref [][]int64, current []int64, confidence float64) error {
	k := len(current)
	if k == 0 {
		return errors.New("estimate label shift: no classes")
	}
	if len(ref) != k {
		return fmt.Errorf("estimate label shift: %d reference rows for %d classes", len(ref), k)
	}
	for i, row := range ref {
		if len(row) != k {
			return fmt.Errorf("estimate label shift: reference row %d has %d columns, want %d", i, len(row), k)
		}
		for _, c := range row {
			if c < 0 {
				return fmt.Errorf("estimate label shift: negative reference count in row %d", i)
			}
		}
		if current[i] < 0 {
			return fmt.Errorf("estimate label shift: negative count of predicted class %d", i)
		}
	}
	if !validConfidence(confidence) {
		return fmt.Errorf("estimate label shift: confidence %g outside (0, 1)", confidence)
	}
	return nil
}

// pseudoInverse returns the Moore–Penrose pseudo-inverse of the square
// matrix a, dropping singular values at most ε·k·σ_max as
// numpy.linalg.lstsq does by default.
func pseudoInverse(a *mat.Dense) (*mat.Dense, error) {
	k, _ := a.Dims()
	var svd mat.SVD
	if !svd.Factorize(a, mat.SVDFull) {
		return nil, errors.New("estimate label shift: singular value decomposition failed")
	}
	s := svd.Values(nil)
	var u, v mat.Dense
	svd.UTo(&u)
	svd.VTo(&v)
	cutoff := math.Nextafter(1, 2) - 1 // machine epsilon
	cutoff *= float64(k) * s[0]
	// pinv = V · diag(1/s) · Uᵀ over the kept singular values.
	scaled := mat.NewDense(k, k, nil)
	for c := range k {
		if s[c] <= cutoff {
			continue
		}
		for r := range k {
			scaled.Set(r, c, v.At(r, c)/s[c])
		}
	}
	var pinv mat.Dense
	pinv.Mul(scaled, u.T())
	return &pinv, nil
}

// deltaSE returns the delta-method standard errors of BBSE's solution:
// the square roots of the diagonal of P·Σ·Pᵀ (see BBSE).
func deltaSE(m *mat.Dense, mu *mat.VecDense, pinv *mat.Dense, q, support []float64, n float64) []float64 {
	k := len(q)
	sigma := mat.NewSymDense(k, nil)
	for a := range k {
		for b := a; b < k; b++ {
			cov := -mu.AtVec(a) * mu.AtVec(b) / n
			for i := range k {
				cov -= q[i] * q[i] * m.At(a, i) * m.At(b, i) / support[i]
			}
			if a == b {
				cov += mu.AtVec(a) / n
				for i := range k {
					cov += q[i] * q[i] * m.At(a, i) / support[i]
				}
			}
			sigma.SetSym(a, b, cov)
		}
	}
	var ps, cov mat.Dense
	ps.Mul(pinv, sigma)
	cov.Mul(&ps, pinv.T())
	se := make([]float64, k)
	for i := range k {
		se[i] = math.Sqrt(max(cov.At(i, i), 0))
	}
	return se
}
