package alerts

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"strings"
	"testing"
	"time"
)

// TestARLWorkedExample checks the Markov-chain ARL against a worked
// example: with one step up and one down the chart is a simple random walk
// on 0 … h reflected at 0 and absorbed at h (the gambler's ruin with a
// reflecting wall; Feller, An Introduction to Probability Theory and Its
// Applications, vol. 1, ch. XIV). Writing d_i = L(i) − L(i+1), the first
// step from 0 gives q·d_0 = 1 and from i ≥ 1 q·d_i = 1 + (1−q)·d_{i−1}, so
// L(0) = Σ d_i; at q = 1/2, d_i = 2(i+1) and L(0) = h(h+1) (our
// derivation).
func TestARLWorkedExample(t *testing.T) {
	for _, c := range []struct {
		h int64
		q float64
	}{{1, 0.5}, {10, 0.5}, {40, 0.5}, {12, 0.3}, {25, 0.45}, {30, 0.7}} {
		d, want := 1/c.q, 0.0
		for i := int64(0); i < c.h; i++ {
			if i > 0 {
				d = (1 + (1-c.q)*d) / c.q
			}
			want += d
		}
		if c.q == 0.5 && want != float64(c.h*(c.h+1)) {
			t.Fatalf("recursion at h=%d gives %g, not h(h+1)", c.h, want)
		}
		got := CUSUM{Bad: 1, Good: 1}.arlAt(c.h, c.q)
		if !near(got, want, 1e-10) {
			t.Errorf("ARL h=%d q=%g: %.12g, want %.12g", c.h, c.q, got, want)
		}
	}
}

// TestARLGolden checks the banded elimination against a dense solve with
// numpy.linalg.solve (numpy 1.24.2, Debian bookworm) of the same chains:
// testdata/cusum/gen.py.
func TestARLGolden(t *testing.T) {
	b, err := os.ReadFile("testdata/cusum/arl.json")
	if err != nil {
		t.Fatal(err)
	}
	var g struct {
		Versions map[string]string
		Cases    []struct {
			Bad, Good, H int64
			Q, ARL       float64
		}
	}
	if err := json.Unmarshal(b, &g); err != nil {
		t.Fatal(err)
	}
	if !strings.HasPrefix(g.Versions["numpy"], "1.24.") || len(g.Cases) == 0 {
		t.Fatalf("golden values from numpy %q (%d cases); the test cites 1.24", g.Versions["numpy"], len(g.Cases))
	}
	for _, c := range g.Cases {
		got := CUSUM{Bad: c.Bad, Good: c.Good}.arlAt(c.H, c.Q)
		if !near(got, c.ARL, 1e-9) {
			t.Errorf("ARL bad=%d good=%d h=%d q=%g: %.12g, numpy %.12g", c.Bad, c.Good, c.H, c.Q, got, c.ARL)
		}
	}
}

// simulateRunLength runs the chart trial by trial from 0 until it signals
// and returns the number of trials; p is the true proportion.
func simulateRunLength(rng *rand.Rand, c CUSUM, p float64) int64 {
	q := c.bad(p)
	var s, n int64
	for s < c.H {
		n++
		if rng.Float64() < q {
			s += c.Bad
		} else {
			s = max(0, s-c.Good)
		}
	}
	return n
}

// TestARLSimulation designs charts for several (p0, p1, target) and checks
// the computed run lengths, in control and after the shift, against direct
// simulation of the chart: the simulated mean must lie within 4.5 standard
// errors of the computed one.
func TestARLSimulation(t *testing.T) {
	rng := rand.New(rand.NewPCG(12, 1))
	for _, c := range []struct{ p0, p1, arl0 float64 }{
		{0.9, 0.7, 500}, // recall drop
		{0.8, 0.6, 300}, // a weaker model's recall drop
		{0.95, 0.85, 400},
		{0.02, 0.04, 2000}, // prevalence rise
		{0.3, 0.45, 250},
	} {
		d, err := DesignCUSUM(c.p0, c.p1, c.arl0)
		if err != nil {
			t.Fatal(err)
		}
		for _, p := range []float64{c.p0, c.p1} {
			want := d.ARL(p)
			const runs = 3000
			var sum, sq float64
			for range runs {
				n := float64(simulateRunLength(rng, d, p))
				sum, sq = sum+n, sq+n*n
			}
			mean := sum / runs
			se := math.Sqrt((sq/runs - mean*mean) / runs)
			if math.Abs(mean-want) > 4.5*se {
				t.Errorf("p0=%g p1=%g h=%d steps (%.3g nats), true p=%g: simulated ARL %.1f ± %.1f, computed %.1f",
					c.p0, c.p1, d.H, d.Threshold(), p, mean, se, want)
			}
		}
	}
}

// TestDesignSmallestThreshold checks that the designed threshold reaches
// the target and one step less does not, and that the rounded weights stay
// within 1% of the log-likelihood ratios' ratio.
func TestDesignSmallestThreshold(t *testing.T) {
	for _, c := range []struct{ p0, p1, arl0 float64 }{
		{0.9, 0.7, 12960}, {0.9, 0.7, 50}, {0.5, 0.55, 1e5}, {0.02, 0.04, 3e5}, {0.99, 0.9, 1e4},
	} {
		d, err := DesignCUSUM(c.p0, c.p1, c.arl0)
		if err != nil {
			t.Fatal(err)
		}
		if got := d.ARL(c.p0); got < c.arl0 {
			t.Errorf("p0=%g p1=%g: ARL %g below the target %g", c.p0, c.p1, got, c.arl0)
		}
		if below := d.arlAt(d.H-1, d.bad(c.p0)); below >= c.arl0 {
			t.Errorf("p0=%g p1=%g: h−1 already gives %g ≥ %g", c.p0, c.p1, below, c.arl0)
		}
		q0, q1 := d.bad(c.p0), d.bad(c.p1)
		ratio := math.Log(q1/q0) / -math.Log((1-q1)/(1-q0))
		if e := math.Abs(float64(d.Bad)/float64(d.Good)-ratio) / ratio; e > 0.01 {
			t.Errorf("p0=%g p1=%g: weights %d/%d are %.2g%% off %g", c.p0, c.p1, d.Bad, d.Good, 100*e, ratio)
		}
	}
	if _, err := DesignCUSUM(0.9, 0.9, 100); err == nil {
		t.Error("DesignCUSUM accepted p1 = p0")
	}
}

// TestBatchedFalseAlarms runs the chart the way the rule does, one bucket
// of Poisson-many trials at a time, over a long in-control history, and
// counts episodes (firing at the threshold, resolved at 0). Entering a
// bucket's trials at once never raises the statistic above the
// trial-by-trial one, so episodes must come no more often than the target.
func TestBatchedFalseAlarms(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 7))
	const (
		perHour = 6.0 // frauds an hour at 300 predictions and 2% prevalence
		every   = 5 * 24 * time.Hour
		bucket  = 5 * time.Minute
		days    = 3000
	)
	d, err := DesignCUSUM(0.9, 0.7, perHour*every.Hours())
	if err != nil {
		t.Fatal(err)
	}
	lambda := perHour * bucket.Hours()
	var s, episodes int64
	firing := false
	for range days * 24 * 12 {
		n := poisson(rng, lambda)
		var bad int64
		for range n {
			if rng.Float64() < 0.1 {
				bad++
			}
		}
		s = max(0, s+d.Bad*bad-d.Good*(n-bad))
		switch {
		case !firing && s >= d.H:
			firing = true
			episodes++
		case firing && s == 0:
			firing = false
		}
	}
	target := float64(days) / (every.Hours() / 24)
	// Poisson noise on the count: allow 3 standard deviations of the
	// target count above it.
	if limit := target + 3*math.Sqrt(target); float64(episodes) > limit {
		t.Errorf("%d false episodes in %d days; the target is %.0f (limit %.0f)", episodes, days, target, limit)
	}
	t.Logf("%d false episodes in %d days, target at most %.0f", episodes, days, target)
}

// poisson draws a Poisson variate by counting exponential gaps (fine for
// the small means used here).
func poisson(rng *rand.Rand, mean float64) int64 {
	var n int64
	for t := rng.ExpFloat64(); t < mean; t += rng.ExpFloat64() {
		n++
	}
	return n
}

func TestRunOrder(t *testing.T) {
	d := CUSUM{Bad: 3, Good: 1, H: 10, Down: true}
	s, since, err := d.Run([]Trials{{Bucket: t0, N: 2, X: 1}, {Bucket: t0.Add(time.Minute), N: 1, X: 1}, {Bucket: t0.Add(2 * time.Minute), N: 4, X: 2}})
	// +3−1 = 2, 2−1 = 1, 1+6−2 = 5.
	if err != nil || s != 5 || !since.Equal(t0) {
		t.Errorf("Run = %d since %s, %v; want 5 since %s", s, since, err, t0)
	}
	if _, _, err := d.Run([]Trials{{Bucket: t0.Add(time.Minute)}, {Bucket: t0}}); err == nil {
		t.Error("Run accepted buckets out of order")
	}
}
