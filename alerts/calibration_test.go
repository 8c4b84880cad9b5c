package alerts

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"
)

// draw simulates n labeled predictions of the legit/fraud model: each is
// fraud with probability prevalence; a fraud is caught with probability
// recall, a legit one passed with probability specificity. It returns the
// confusion matrix rows.
func draw(rng *rand.Rand, n int, prevalence, recall, specificity float64) [][]int64 {
	var tn, fp, fn, tp int64
	for range n {
		if rng.Float64() < prevalence {
			if rng.Float64() < recall {
				tp++
			} else {
				fn++
			}
		} else if rng.Float64() < specificity {
			tn++
		} else {
			fp++
		}
	}
	return binaryRows(tn, fp, fn, tp)
}

// firing reports whether the instance key of m is firing.
func firing(m *Manager, key string) bool {
	in := m.instanceOf(key)
	return in != nil && in.State == StateFiring
}

// TestFalseAlarmRate evaluates a floor and a drop rule over 2,000
// independent windows of a stationary stream: 2,000 labeled predictions
// per window, fraud prevalence 5%, fraud recall exactly at the floor
// (0.80), legit recall 0.98; the reference week (20,000 labeled) has the
// same rates. Every firing is a false alarm. The rate must not exceed the
// configured level 1 − confidence = 0.05 by more than sampling error
// (one-sided 99% bound, 0.05 + 2.33·√(0.05·0.95/2000) ≈ 0.061).
//
// The floor rule uses the two-sided 95% Wilson interval, so its rate at
// the floor itself should be near 0.025; the drop rule tests both classes
// one-sided at 0.05 with Benjamini–Hochberg, which bounds the chance of any
// false firing by 0.05 when nothing changed (Benjamini & Hochberg 1995).
func TestFalseAlarmRate(t *testing.T) {
	const (
		windowsN   = 2000
		labeled    = 2000
		refLabeled = 20000
		prevalence = 0.05
		recall     = 0.80
		specific   = 0.98
		confidence = 0.95
	)
	b := setup(t)
	m := b.manager(t, b.options(
		Rule{Name: "floor", Kind: KindFloor, Model: "card-fraud", Window: "1d", Metric: "recall",
			Classes: []string{"fraud"}, Threshold: recall, Confidence: confidence, Schedule: "0 0 1 1 *"},
		Rule{Name: "drop", Kind: KindDrop, Model: "card-fraud", Window: "1d", Confidence: confidence,
			Reference: Reference{Window: "7d-matured"}, Schedule: "0 0 1 1 *"},
	))
	rng := rand.New(rand.NewPCG(20260301, 1))
	var floorFires, dropFires, dropFraud, dropLegit int
	for i := range windowsN {
		b.views.set(t, "card-fraud", dayWindow, binary, draw(rng, labeled, prevalence, recall, specific), nil)
		b.views.set(t, "card-fraud", weekWindow, binary, draw(rng, refLabeled, prevalence, recall, specific), nil)
		evaluate(t, m, t0.Add(time.Duration(i)*time.Hour))
		if firing(m, instanceKey("floor", "card-fraud", "fraud", "")) {
			floorFires++
		}
		f, l := firing(m, instanceKey("drop", "card-fraud", "fraud", "")), firing(m, instanceKey("drop", "card-fraud", "legit", ""))
		if f || l {
			dropFires++
		}
		if f {
			dropFraud++
		}
		if l {
			dropLegit++
		}
	}
	limit := (1 - confidence) + 2.33*math.Sqrt((1-confidence)*confidence/windowsN)
	floorRate, dropRate := float64(floorFires)/windowsN, float64(dropFires)/windowsN
	t.Logf("false-alarm rate over %d stationary windows: floor %.4f (%d), drop %.4f (%d; fraud %d, legit %d); limit %.4f",
		windowsN, floorRate, floorFires, dropRate, dropFires, dropFraud, dropLegit, limit)
	if floorRate > limit {
		t.Errorf("floor rule false-alarm rate %.4f exceeds %.4f", floorRate, limit)
	}
	if dropRate > limit {
		t.Errorf("drop rule false-alarm rate %.4f exceeds %.4f", dropRate, limit)
	}
	// A rule that compared point values would fire about half the time at
	// the floor: the test could tell.
	if floorFires == 0 || dropFires == 0 {
		t.Errorf("no false alarm at all (floor %d, drop %d): the simulation does not sit at the boundary", floorFires, dropFires)
	}
}

// TestSensitivity measures how many labels it takes to notice a real
// recall drop on a minority class. The stream: 600 labeled predictions per
// hour, fraud prevalence 2% (about 12 labeled frauds an hour), legit recall
// 0.98; fraud recall falls from 0.90 to 0.70 at a bucket boundary. The
// current window is the last 24 hourly buckets, evaluated every hour; the
// reference is a matured week (168 buckets) at 0.90. Labels are assumed to
// arrive at once. For each of 50 seeds it counts the labels (all, and
// fraud) that arrived after the change until the rule fired, and reports
// the medians for the drop rule (margin 0) and a floor at 0.80.
func TestSensitivity(t *testing.T) {
	const (
		seeds      = 50
		perBucket  = 600
		window     = 24
		refBuckets = 168
		prevalence = 0.02
		before     = 0.90
		after      = 0.70
		specific   = 0.98
		maxBuckets = 7 * 24
	)
	rules := []Rule{
		{Name: "drop", Kind: KindDrop, Model: "card-fraud", Window: "1d", Classes: []string{"fraud"},
			Reference: Reference{Window: "7d-matured"}, Schedule: "0 0 1 1 *"},
		{Name: "floor", Kind: KindFloor, Model: "card-fraud", Window: "1d", Metric: "recall",
			Classes: []string{"fraud"}, Threshold: 0.8, Schedule: "0 0 1 1 *"},
	}
	for _, r := range rules {
		var labels, frauds []int
		for seed := range seeds {
			b := setup(t)
			m := b.manager(t, b.options(r))
			rng := rand.New(rand.NewPCG(uint64(seed), 2))
			ref := draw(rng, perBucket*refBuckets, prevalence, before, specific)
			b.views.set(t, "card-fraud", weekWindow, binary, ref, nil)
			var buckets [][][]int64
			for range window {
				buckets = append(buckets, draw(rng, perBucket, prevalence, before, specific))
			}
			key := instanceKey(r.Name, "card-fraud", "fraud", "")
			n, nf, fired := 0, 0, false
			for h := range maxBuckets {
				nb := draw(rng, perBucket, prevalence, after, specific)
				n += perBucket
				nf += int(nb[1][0] + nb[1][1])
				buckets = append(buckets[1:], nb)
				sum := binaryRows(0, 0, 0, 0)
				for _, bk := range buckets {
					for a := range 2 {
						for p := range 2 {
							sum[a][p] += bk[a][p]
						}
					}
				}
				b.views.set(t, "card-fraud", dayWindow, binary, sum, nil)
				evaluate(t, m, t0.Add(time.Duration(h)*time.Hour))
				if firing(m, key) {
					fired = true
					break
				}
			}
			if !fired {
				t.Errorf("%s rule: seed %d never fired within %d hours of the drop", r.Name, seed, maxBuckets)
				continue
			}
			labels, frauds = append(labels, n), append(frauds, nf)
		}
		t.Logf("%s rule: recall %.2f→%.2f at prevalence %.0f%%: median %s labels (%s fraud labels) after the change until firing, over %d seeds",
			r.Name, before, after, 100*prevalence, median(labels), median(frauds), seeds)
	}
}

func median(v []int) string {
	if len(v) == 0 {
		return "none"
	}
	s := slices.Clone(v)
	slices.Sort(s)
	if len(s)%2 == 1 {
		return fmt.Sprint(s[len(s)/2])
	}
	return fmt.Sprint(float64(s[len(s)/2-1]+s[len(s)/2]) / 2)
}
