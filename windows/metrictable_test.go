package windows

import (
	"math/rand/v2"
	"regexp"
	"strings"
	"testing"
)

// TestMetricDefsWellFormed checks the table's own rules: unique names,
// Prometheus names by the conventions (snake case, "_ratio" only for a
// figure in [0, 1]), and the readers each kind of metric needs.
func TestMetricDefsWellFormed(t *testing.T) {
	snake := regexp.MustCompile(`^[a-z][a-z0-9]*(_[a-z0-9]+)*$`)
	names, titles, proms := map[string]bool{}, map[string]bool{}, map[string]bool{}
	for _, d := range MetricDefs() {
		if !snake.MatchString(d.Name) || names[d.Name] {
			t.Errorf("name %q: not snake case or repeated", d.Name)
		}
		names[d.Name] = true
		if d.Title == "" || titles[d.Title] {
			t.Errorf("%s: title %q empty or repeated", d.Name, d.Title)
		}
		titles[d.Title] = true
		if d.Value == nil {
			t.Errorf("%s: no Value", d.Name)
		}
		if d.Counts != nil && d.Judged != nil {
			t.Errorf("%s: both Counts and Judged", d.Name)
		}
		if d.PromBounds != "" && (d.Interval == nil || d.Prom == "") {
			t.Errorf("%s: PromBounds without an exported interval", d.Name)
		}
		if d.Prom == "" {
			continue
		}
		if !strings.HasPrefix(d.Prom, "classwatch_") || !snake.MatchString(d.Prom) || proms[d.Prom] || d.Help == "" {
			t.Errorf("%s: Prometheus name %q malformed or repeated, or no help", d.Name, d.Prom)
		}
		proms[d.Prom] = true
		ratio := strings.HasSuffix(d.Prom, "_ratio")
		if (d.Min < 0 && ratio) || (d.Counts != nil && !ratio) {
			t.Errorf("%s: %q: a proportion ends in \"_ratio\", a figure below 0 does not", d.Name, d.Prom)
		}
	}
}

// TestMetricDefsCountsMatchValues checks on random matrices that a
// proportion's Counts, which alert rules test, give exactly the value that
// /metrics and the JSON API show.
func TestMetricDefsCountsMatchValues(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 3))
	for range 200 {
		k := 2 + rng.IntN(4)
		m := NewMatrix(classNames(k))
		pred := make([]int64, k)
		for a := range k {
			for p := range k {
				if rng.IntN(3) > 0 {
					n := int64(rng.IntN(20))
					m.Add(a, p, n)
					pred[p] += n
				}
			}
		}
		for p := range k {
			pred[p] += int64(rng.IntN(5)) // unlabeled predictions
		}
		ms := Compute(m, pred, 0.95)
		for _, d := range MetricDefs() {
			if d.Counts == nil {
				continue
			}
			for c := range k {
				x, n := d.Counts(m, pred, c)
				v := d.Value(&ms, c)
				switch {
				case n == 0 && v != nil:
					t.Fatalf("%s of class %d: no trials but value %g", d.Name, c, *v)
				case n > 0 && (v == nil || *v != float64(x)/float64(n)):
					t.Fatalf("%s of class %d: counts %d/%d, value %v", d.Name, c, x, n, v)
				}
				if d.Scope == ScopeWindow {
					break
				}
			}
		}
	}
}

// TestMetricDefsFromScores checks the FromScores marks, by which the rule
// backtest decides whether to read scores: on random periods, a metric
// marked FromScores is undefined without score aggregates, and every other
// metric takes the same value with and without them.
func TestMetricDefsFromScores(t *testing.T) {
	rng := rand.New(rand.NewPCG(17, 5))
	for range 100 {
		k := 2 + rng.IntN(4)
		m := NewMatrix(classNames(k))
		pred := make([]int64, k)
		for a := range k {
			for p := range k {
				n := int64(1 + rng.IntN(20))
				m.Add(a, p, n)
				pred[p] += n + int64(rng.IntN(5))
			}
		}
		scores, refScores := randomScoreSums(rng, k), randomScoreSums(rng, k)
		without := Compute(m, pred, 0.95)
		AddEarlyWarning(&without, pred, nil, &Reference{Matrix: m}, 0.95)
		with := Compute(m, pred, 0.95)
		AddEarlyWarning(&with, pred, scores, &Reference{Matrix: m, Scores: refScores}, 0.95)
		for _, d := range MetricDefs() {
			for c := range k {
				a, b := d.Value(&without, c), d.Value(&with, c)
				switch {
				case d.FromScores && a != nil:
					t.Fatalf("%s is marked FromScores but is %v without score aggregates", d.Name, *a)
				case !d.FromScores && (a == nil) != (b == nil):
					t.Fatalf("%s is not marked FromScores but is %v without score aggregates and %v with them", d.Name, a, b)
				case !d.FromScores && a != nil && *a != *b:
					t.Fatalf("%s is not marked FromScores but is %v without score aggregates and %v with them", d.Name, *a, *b)
				}
			}
		}
	}
}

// randomScoreSums returns score aggregates of k classes with some of
// everything.
func randomScoreSums(rng *rand.Rand, k int) *ScoreSums {
	s := NewScoreSums(k)
	for c := range k {
		for b := range s.Hist[c] {
			s.Hist[c][b] = int64(1 + rng.IntN(9))
		}
	}
	for b := range s.Calib {
		n := int64(1 + rng.IntN(9))
		s.Calib[b] = CalibrationBin{N: n, ScoreSum: float64(n) * rng.Float64(), Correct: int64(rng.IntN(int(n) + 1))}
		s.BrierN += n
	}
	s.BrierSum = float64(s.BrierN) * rng.Float64()
	return s
}
