package alerts

import (
	"errors"
	"fmt"
	"math"
	"time"
)

// Trials are one bucket's trials of a proportion and how many of them were
// successes (for recall of a class: its labeled examples, and those
// predicted right).
type Trials struct {
	Bucket time.Time
	N, X   int64
}

// CUSUM is the design of a Bernoulli CUSUM (Page 1954) on an integer
// grid. Each trial adds its log-likelihood ratio of the shifted proportion
// p1 against the in-control p0, in units of Unit nats: Bad units for the
// outcome that p1 makes likelier (a failure when watching for a drop, a
// success when watching for a rise), minus Good units for the other. The
// statistic never goes below 0 and signals at H units.
//
// The two weights are rounded to the integer pair with the smallest good
// weight whose ratio lies within 1% of theirs (or the closest pair up to
// maxGridWeight); the chart run is this integer chart, so its run lengths,
// computed exactly by ARL, are those of the statistic the rule reports.
type CUSUM struct {
	// P0 and P1 are the in-control and the shifted proportion; Down is
	// P1 < P0.
	P0, P1 float64
	Down   bool
	// Unit is the grid step in nats; Bad and Good are the steps added per
	// bad and removed per good outcome; H is the threshold in steps.
	Unit      float64
	Bad, Good int64
	H         int64
}

// maxGridWeight bounds Bad and Good, and so the cost of ARL.
const maxGridWeight = 200

// maxThresholdSteps bounds H: far beyond any threshold a false-alarm
// target of years at millions of trials a day needs.
const maxThresholdSteps = 1 << 16

// DesignCUSUM returns the CUSUM for p0 against p1 whose in-control average
// run length is at least arl0 trials, with the smallest threshold that
// achieves it.
func DesignCUSUM(p0, p1, arl0 float64) (CUSUM, error) {
	if !(p0 > 0 && p0 < 1 && p1 > 0 && p1 < 1) || p0 == p1 {
		return CUSUM{}, fmt.Errorf("design cusum: p0 %g and p1 %g must differ and lie strictly between 0 and 1", p0, p1)
	}
	if !(arl0 >= 1) {
		return CUSUM{}, fmt.Errorf("design cusum: in-control run length %g is below one trial", arl0)
	}
	c := CUSUM{P0: p0, P1: p1, Down: p1 < p0}
	q0, q1 := c.bad(p0), c.bad(p1)
	wBad := math.Log(q1 / q0)               // > 0
	wGood := -math.Log((1 - q1) / (1 - q0)) // > 0
	c.Bad, c.Good = gridWeights(wBad / wGood)
	c.Unit = wBad / float64(c.Bad)
	// ARL grows with H: double, then bisect for the smallest H reaching arl0.
	lo, hi := int64(0), int64(1)
	for c.arlAt(hi, q0) < arl0 {
		if hi >= maxThresholdSteps {
			return CUSUM{}, fmt.Errorf("design cusum: no threshold up to %d steps gives a run length of %g trials", hi, arl0)
		}
		lo, hi = hi, min(2*hi, maxThresholdSteps)
	}
	for hi-lo > 1 {
		mid := lo + (hi-lo)/2
		if c.arlAt(mid, q0) >= arl0 {
			hi = mid
		} else {
			lo = mid
		}
	}
	c.H = hi
	return c, nil
}

// bad returns the probability of the bad outcome when the proportion is p.
func (c CUSUM) bad(p float64) float64 {
	if c.Down {
		return 1 - p
	}
	return p
}

// gridWeights returns the integer pair (bad, good) with the smallest good
// whose ratio lies within 1% of r, or else the closest pair.
func gridWeights(r float64) (bad, good int64) {
	best, bestErr := [2]int64{1, 1}, math.Inf(1)
	for g := int64(1); g <= maxGridWeight; g++ {
		b := int64(math.Round(r * float64(g)))
		if b < 1 || b > maxGridWeight {
			continue
		}
		e := math.Abs(float64(b)/float64(g)-r) / r
		if e < bestErr {
			best, bestErr = [2]int64{b, g}, e
		}
		if e <= 0.01 {
			break
		}
	}
	return best[0], best[1]
}

// Threshold is H in nats.
func (c CUSUM) Threshold() float64 { return float64(c.H) * c.Unit }

// ARL returns the average run length, in trials, of the chart started at 0
// when the proportion is p: the expected number of trials until the
// statistic reaches H, trial by trial.
func (c CUSUM) ARL(p float64) float64 { return c.arlAt(c.H, c.bad(p)) }

// arlAt computes the average run length with threshold h when the bad
// outcome has probability q, by the Markov chain of Brook & Evans (1972):
// the statistic's states 0 … h−1 are transient, reaching h absorbs, and the
// run lengths L solve (I − R)·L = 1. On the integer grid the chain is
// exact. R has two entries a row (i → i+Bad, i → max(0, i−Good)), so I − R
// is banded and, being a nonsingular M-matrix, is solved by Gaussian
// elimination without pivoting in O(h·Bad·Good).
func (c CUSUM) arlAt(h int64, q float64) float64 {
	if h <= 0 {
		return 0
	}
	n := int(h)
	lb, ub := int(min(c.Good, h-1)), int(min(c.Bad, h-1))
	w := lb + ub + 1
	a := make([]float64, n*w) // a[i*w + (j-i+lb)] = A[i][j]
	at := func(i, j int) *float64 { return &a[i*w+j-i+lb] }
	rhs := make([]float64, n)
	for i := range n {
		*at(i, i) += 1
		if up := i + int(c.Bad); up < n {
			*at(i, up) -= q
		}
		*at(i, max(0, i-int(c.Good))) -= 1 - q
		rhs[i] = 1
	}
	for k := range n {
		piv := *at(k, k)
		for i := k + 1; i <= min(n-1, k+lb); i++ {
			f := *at(i, k) / piv
			if f == 0 {
				continue
			}
			for j := k; j <= min(n-1, k+ub); j++ {
				*at(i, j) -= f * *at(k, j)
			}
			rhs[i] -= f * rhs[k]
		}
	}
	for i := n - 1; i >= 0; i-- {
		s := rhs[i]
		for j := i + 1; j <= min(n-1, i+ub); j++ {
			s -= *at(i, j) * rhs[j]
		}
		rhs[i] = s / *at(i, i)
	}
	return rhs[0]
}

// errUnordered: a bucket sequence for the CUSUM must be in time order.
var errUnordered = errors.New("buckets out of time order")

// Run computes the statistic over the buckets in time order, from 0, each
// bucket's trials entering at once: S = max(0, S + Bad·bad − Good·good)
// after each bucket. It returns S in steps and the first bucket of the
// current excursion above 0 (zero when S is 0).
func (c CUSUM) Run(seq []Trials) (s int64, since time.Time, err error) {
	for i, t := range seq {
		if i > 0 && !seq[i-1].Bucket.Before(t.Bucket) {
			return 0, time.Time{}, fmt.Errorf("run cusum: bucket %s: %w", t.Bucket.Format(time.RFC3339), errUnordered)
		}
		bad := t.N - t.X
		if !c.Down {
			bad = t.X
		}
		next := max(0, s+c.Bad*bad-c.Good*(t.N-bad))
		switch {
		case next == 0:
			since = time.Time{}
		case s == 0:
			since = t.Bucket
		}
		s = next
	}
	return s, since, nil
}
