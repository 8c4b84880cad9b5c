package alerts

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/stats"
	"github.com/classwatch/classwatch/windows/store"
)

// golden holds alerts/testdata/golden.json, written by
// alerts/testdata/gen.py with SciPy 1.10.1 and statsmodels 0.13.5 (the
// versions are recorded in the file and checked below).
type golden struct {
	Versions map[string]string `json:"versions"`
	Floor    []boundCase       `json:"floor"`
	Ceiling  []boundCase       `json:"ceiling"`
	Drop     []edgeCase        `json:"drop"`
	Rise     []edgeCase        `json:"rise"`
	BH       struct {
		Confidence float64 `json:"confidence"`
		Classes    []struct {
			X1, N1, X2, N2 int64
			P              float64
		} `json:"classes"`
		Reject []bool `json:"reject"`
	} `json:"bh"`
	Shift []struct {
		Fire shiftCase `json:"fire"`
		Hold shiftCase `json:"hold"`
	} `json:"shift"`
	PooledShift shiftCase `json:"pooled_shift"`
}

type boundCase struct {
	N          int64   `json:"n"`
	Threshold  float64 `json:"threshold"`
	Confidence float64 `json:"confidence"`
	Interval   string  `json:"interval"`
	Fire, Hold struct {
		X        int64      `json:"x"`
		Interval [2]float64 `json:"interval"`
	}
}

type edgeCase struct {
	N1         int64   `json:"n1"`
	X2         int64   `json:"x2"`
	N2         int64   `json:"n2"`
	Margin     float64 `json:"margin"`
	Confidence float64 `json:"confidence"`
	Fire, Hold comparisonCase
}

type comparisonCase struct {
	X                  int64      `json:"x"`
	P                  float64    `json:"p"`
	Interval           [2]float64 `json:"interval"`
	Difference         float64    `json:"difference"`
	DifferenceInterval [2]float64 `json:"difference_interval"`
}

type homogeneityCase struct {
	Statistic float64 `json:"statistic"`
	P         float64 `json:"p"`
	DF        int     `json:"df"`
}

type shiftCase struct {
	Current    []int64         `json:"current"`
	Reference  []int64         `json:"reference"`
	Confidence float64         `json:"confidence"`
	ChiSquare  homogeneityCase `json:"chi_square"`
	GTest      homogeneityCase `json:"g_test"`
	PSI        float64         `json:"psi"`
}

func loadGolden(tb testing.TB) golden {
	tb.Helper()
	b, err := os.ReadFile("testdata/golden.json")
	if err != nil {
		tb.Fatalf("read golden values: %v", err)
	}
	var g golden
	if err := json.Unmarshal(b, &g); err != nil {
		tb.Fatalf("decode golden values: %v", err)
	}
	if !strings.HasPrefix(g.Versions["scipy"], "1.10.1") || !strings.HasPrefix(g.Versions["statsmodels"], "0.13.5") {
		tb.Fatalf("golden values from scipy %s, statsmodels %s; the tests cite 1.10.1 and 0.13.5", g.Versions["scipy"], g.Versions["statsmodels"])
	}
	return g
}

// findings evaluates every rule of m at t0 without touching alert state
// and returns the results by instance key.
func findings(tb testing.TB, m *Manager) map[string]Result {
	tb.Helper()
	ctx := context.Background()
	models, err := m.store.Models(ctx)
	if err != nil {
		tb.Fatalf("list models: %v", err)
	}
	env := m.env(t0, models)
	out := make(map[string]Result)
	for _, r := range m.rules {
		fs, _, err := r.Evaluate(ctx, env)
		if err != nil {
			tb.Fatalf("evaluate rule %s: %v", r.Name, err)
		}
		for _, f := range fs {
			out[instanceKey(r.Name, f.Model, f.Class, f.Predicted)] = f.Result
		}
	}
	return out
}

// near reports whether got is within tol of want, absolutely or relative
// to want's size (p-values far below 1 are compared relatively).
func near(got, want, tol float64) bool {
	return math.Abs(got-want) <= tol*math.Max(1, math.Abs(want)) || math.Abs(got-want) <= tol*math.Abs(want)
}

func checkNear(tb testing.TB, what string, got *float64, want, tol float64) {
	tb.Helper()
	if got == nil {
		tb.Errorf("%s = null, want %.12g", what, want)
		return
	}
	if !near(*got, want, tol) {
		tb.Errorf("%s = %.12g, want %.12g", what, *got, want)
	}
}

func checkInterval(tb testing.TB, what string, got *[2]float64, want [2]float64, tol float64) {
	tb.Helper()
	if got == nil {
		tb.Errorf("%s = null, want %v", what, want)
		return
	}
	if !near(got[0], want[0], tol) || !near(got[1], want[1], tol) {
		tb.Errorf("%s = [%.12g, %.12g], want [%.12g, %.12g]", what, got[0], got[1], want[0], want[1])
	}
}

func checkOutcome(tb testing.TB, what string, res Result, want Outcome) {
	tb.Helper()
	if res.Outcome != want {
		tb.Errorf("%s: outcome %s (%s), want %s", what, res.Outcome, res.Reason, want)
	}
}

// TestFloorEdges checks recall floors at the count just inside and just
// outside the floor: the upper Wilson (or Jeffreys) bound just below the
// floor fires, the next count, whose interval straddles the floor, does
// not; below min_count nothing is judged. Intervals: statsmodels 0.13.5
// proportion_confint(method='wilson'/'jeffreys') via testdata/golden.json.
func TestFloorEdges(t *testing.T) {
	g := loadGolden(t)
	for _, c := range g.Floor {
		for _, side := range []struct {
			name     string
			x        int64
			interval [2]float64
			want     Outcome
		}{{"fire", c.Fire.X, c.Fire.Interval, OutcomeMet}, {"hold", c.Hold.X, c.Hold.Interval, OutcomeClear}} {
			t.Run(fmt.Sprintf("%s/n=%d/x=%d/%s", c.Interval, c.N, side.x, side.name), func(t *testing.T) {
				b := setup(t)
				b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(5000, 40, c.N-side.x, side.x), nil)
				m := b.manager(t, b.options(Rule{
					Name: "fraud-recall-floor", Kind: KindFloor, Model: "card-fraud", Window: "1d",
					Metric: "recall", Classes: []string{"fraud"}, Threshold: c.Threshold,
					Confidence: c.Confidence, Interval: c.Interval, MinCount: 30,
				}))
				res := findings(t, m)[instanceKey("fraud-recall-floor", "card-fraud", "fraud", "")]
				want := side.want
				if c.N < 30 {
					want = OutcomeUnknown // support just below min_count
				} else {
					checkInterval(t, "recall interval", res.Interval, side.interval, 1e-9)
				}
				checkOutcome(t, "floor", res, want)
				if res.Count != c.N {
					t.Errorf("count = %d, want %d", res.Count, c.N)
				}
			})
		}
	}
}

// TestCeilingEdges checks ceilings on a per-class proportion (prevalence of
// fraud) and on a model-level one (label coverage): the lower bound just
// above the ceiling fires, the next count down does not. Intervals:
// statsmodels 0.13.5 proportion_confint(method='wilson').
func TestCeilingEdges(t *testing.T) {
	g := loadGolden(t)
	for i, c := range g.Ceiling {
		for _, side := range []struct {
			name     string
			x        int64
			interval [2]float64
			want     Outcome
		}{{"fire", c.Fire.X, c.Fire.Interval, OutcomeMet}, {"hold", c.Hold.X, c.Hold.Interval, OutcomeClear}} {
			t.Run(fmt.Sprintf("%d/%s", i, side.name), func(t *testing.T) {
				b := setup(t)
				r := Rule{Name: "ceiling", Kind: KindCeiling, Model: "card-fraud", Window: "1d",
					Threshold: c.Threshold, Confidence: c.Confidence}
				key := instanceKey("ceiling", "card-fraud", "", "")
				if i == 0 {
					// prevalence of fraud: x fraud examples of n labeled
					b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(c.N-side.x, 0, 0, side.x), nil)
					r.Metric, r.Classes = "prevalence", []string{"fraud"}
					key = instanceKey("ceiling", "card-fraud", "fraud", "")
				} else {
					// label coverage: x labeled of n predictions
					b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(side.x, 0, 0, 0), []int64{c.N, 0})
					r.Metric = "label_coverage"
				}
				m := b.manager(t, b.options(r))
				res := findings(t, m)[key]
				checkInterval(t, r.Metric+" interval", res.Interval, side.interval, 1e-9)
				checkOutcome(t, "ceiling", res, side.want)
			})
		}
	}
}

// TestDropEdges checks drop rules at the p-value just at or below the level
// and just above it. Sources (testdata/golden.json): scipy 1.10.1
// stats.fisher_exact (one-sided; checked there against stats.hypergeom) for
// margin 0; Farrington & Manning's score test with
// the restricted estimate from scipy.optimize.brentq for a margin;
// statsmodels 0.13.5 confint_proportions_2indep(method='newcomb') for the
// difference; proportion_confint(method='wilson') for the current recall.
func TestDropEdges(t *testing.T) {
	g := loadGolden(t)
	for _, c := range g.Drop {
		for _, side := range []struct {
			name string
			c    comparisonCase
			want Outcome
		}{{"fire", c.Fire, OutcomeMet}, {"hold", c.Hold, OutcomeClear}} {
			t.Run(fmt.Sprintf("n1=%d/margin=%g/%s", c.N1, c.Margin, side.name), func(t *testing.T) {
				b := setup(t)
				b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(8000, 30, c.N1-side.c.X, side.c.X), nil)
				b.views.set(t, "card-fraud", weekWindow, binary, binaryRows(60000, 200, c.N2-c.X2, c.X2), nil)
				m := b.manager(t, b.options(Rule{
					Name: "fraud-recall-drop", Kind: KindDrop, Model: "card-fraud", Window: "1d",
					Classes: []string{"fraud"}, Margin: c.Margin, Confidence: c.Confidence,
					Reference: Reference{Window: "7d-matured"},
				}))
				res := findings(t, m)[instanceKey("fraud-recall-drop", "card-fraud", "fraud", "")]
				checkOutcome(t, "drop", res, side.want)
				checkNear(t, "p-value", res.PValue, side.c.P, 1e-9)
				checkInterval(t, "recall interval", res.Interval, side.c.Interval, 1e-9)
				checkNear(t, "difference", res.Difference, side.c.Difference, 1e-12)
				checkInterval(t, "difference interval", res.DifferenceInterval, side.c.DifferenceInterval, 1e-9)
				if res.Reference == nil || res.Reference.Count != c.N2 {
					t.Errorf("reference = %+v, want count %d", res.Reference, c.N2)
				}
			})
		}
	}
}

// TestConfusionRiseEdges checks the share of fraud predicted as legit
// against the reference at the level's edge. Sources as TestDropEdges, in
// the upper tail.
func TestConfusionRiseEdges(t *testing.T) {
	g := loadGolden(t)
	for _, c := range g.Rise {
		for _, side := range []struct {
			name string
			c    comparisonCase
			want Outcome
		}{{"fire", c.Fire, OutcomeMet}, {"hold", c.Hold, OutcomeClear}} {
			t.Run(fmt.Sprintf("n1=%d/margin=%g/%s", c.N1, c.Margin, side.name), func(t *testing.T) {
				b := setup(t)
				// fraud row: x predicted legit, the rest fraud
				b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(8000, 30, side.c.X, c.N1-side.c.X), nil)
				b.views.set(t, "card-fraud", weekWindow, binary, binaryRows(60000, 200, c.X2, c.N2-c.X2), nil)
				m := b.manager(t, b.options(Rule{
					Name: "missed-fraud", Kind: KindConfusionRise, Model: "card-fraud", Window: "1d",
					Pairs: []Pair{{Actual: "fraud", Predicted: "legit"}}, Margin: c.Margin,
					Confidence: c.Confidence, Reference: Reference{Window: "7d-matured"},
				}))
				res := findings(t, m)[instanceKey("missed-fraud", "card-fraud", "fraud", "legit")]
				checkOutcome(t, "confusion rise", res, side.want)
				checkNear(t, "p-value", res.PValue, side.c.P, 1e-9)
				checkNear(t, "difference", res.Difference, side.c.Difference, 1e-12)
				checkInterval(t, "difference interval", res.DifferenceInterval, side.c.DifferenceInterval, 1e-9)
			})
		}
	}
}

// TestDropBenjaminiHochberg checks that a drop rule over three classes
// decides them together: the second class's p-value lies below the level
// but above its Benjamini–Hochberg threshold, so it does not fire. Sources:
// scipy 1.10.1 stats.fisher_exact and statsmodels 0.13.5
// multipletests(method='fdr_bh') via testdata/golden.json.
func TestDropBenjaminiHochberg(t *testing.T) {
	g := loadGolden(t)
	b := setup(t)
	classes := []string{"billing", "outage", "account"}
	if _, err := b.st.EnsureModel(context.Background(), "ticket-router", classes, 0); err != nil {
		t.Fatal(err)
	}
	cur, ref := make([][]int64, 3), make([][]int64, 3)
	for k, c := range g.BH.Classes {
		cur[k], ref[k] = make([]int64, 3), make([]int64, 3)
		cur[k][k], cur[k][(k+1)%3] = c.X1, c.N1-c.X1
		ref[k][k], ref[k][(k+1)%3] = c.X2, c.N2-c.X2
	}
	b.views.set(t, "ticket-router", dayWindow, classes, cur, nil)
	b.views.set(t, "ticket-router", weekWindow, classes, ref, nil)
	m := b.manager(t, b.options(Rule{
		Name: "routing-recall-drop", Kind: KindDrop, Model: "ticket-router", Window: "1d",
		Confidence: g.BH.Confidence, Reference: Reference{Window: "7d-matured"},
	}))
	got := findings(t, m)
	for k, c := range g.BH.Classes {
		res := got[instanceKey("routing-recall-drop", "ticket-router", classes[k], "")]
		checkNear(t, classes[k]+" p-value", res.PValue, c.P, 1e-9)
		checkOutcome(t, classes[k], res, outcome(g.BH.Reject[k]))
	}
	// Per-class tests would fire the second class too (p ≤ 0.05).
	if !(g.BH.Classes[1].P < 1-g.BH.Confidence) || g.BH.Reject[1] {
		t.Fatalf("golden case does not separate BH from per-class tests: p=%g reject=%v", g.BH.Classes[1].P, g.BH.Reject[1])
	}
}

// TestShiftEdges checks prevalence_shift (chi-square and G) at the p-value
// edge, and output_shift with sparse classes pooled. Sources:
// scipy 1.10.1 chi2_contingency(correction=False) and
// chi2_contingency(lambda_='log-likelihood'); PSI from numpy's arithmetic;
// via testdata/golden.json.
func TestShiftEdges(t *testing.T) {
	g := loadGolden(t)
	classes := []string{"legit", "fraud", "dispute"}
	diag := func(v []int64) [][]int64 {
		rows := make([][]int64, len(v))
		for k := range v {
			rows[k] = make([]int64, len(v))
			rows[k][k] = v[k]
		}
		return rows
	}
	for _, e := range g.Shift {
		for _, side := range []struct {
			name string
			c    shiftCase
			want Outcome
		}{{"fire", e.Fire, OutcomeMet}, {"hold", e.Hold, OutcomeClear}} {
			for _, test := range []string{TestChiSquare, TestG} {
				t.Run(side.name+"/"+test, func(t *testing.T) {
					b := setup(t)
					if _, err := b.st.EnsureModel(context.Background(), "card-fraud", classes, 0); err != nil {
						t.Fatal(err)
					}
					b.views.set(t, "card-fraud", dayWindow, classes, diag(side.c.Current), nil)
					b.views.set(t, "card-fraud", weekWindow, classes, diag(side.c.Reference), nil)
					m := b.manager(t, b.options(Rule{
						Name: "fraud-mix", Kind: KindPrevalenceShift, Model: "card-fraud", Window: "1d",
						Test: test, Confidence: side.c.Confidence, Reference: Reference{Window: "7d-matured"},
					}))
					res := findings(t, m)[instanceKey("fraud-mix", "card-fraud", "", "")]
					want := side.c.ChiSquare
					if test == TestG {
						want = side.c.GTest
					} else {
						checkOutcome(t, "chi-square shift", res, side.want)
					}
					checkNear(t, "statistic", res.Statistic, want.Statistic, 1e-9)
					checkNear(t, "p-value", res.PValue, want.P, 1e-9)
					if res.DF == nil || *res.DF != want.DF {
						t.Errorf("df = %v, want %d", res.DF, want.DF)
					}
					checkNear(t, "PSI", res.PSI, side.c.PSI, 1e-9)
				})
			}
		}
	}

	t.Run("pooled/output", func(t *testing.T) {
		c := g.PooledShift
		classes := []string{"legit", "fraud", "dispute", "chargeback"}
		for _, psi := range []struct {
			threshold float64
			want      Outcome
		}{{c.PSI * 1.01, OutcomeClear}, {c.PSI * 0.99, OutcomeMet}} {
			b := setup(t)
			if _, err := b.st.EnsureModel(context.Background(), "card-fraud", classes, 0); err != nil {
				t.Fatal(err)
			}
			// No labels at all: output_shift reads predictions only.
			empty := diag(make([]int64, 4))
			b.views.set(t, "card-fraud", dayWindow, classes, empty, c.Current)
			b.views.set(t, "card-fraud", weekWindow, classes, empty, c.Reference)
			m := b.manager(t, b.options(
				Rule{Name: "output-mix", Kind: KindOutputShift, Model: "card-fraud", Window: "1d",
					Reference: Reference{Window: "7d-matured"}},
				Rule{Name: "output-psi", Kind: KindOutputShift, Model: "card-fraud", Window: "1d",
					Test: TestNone, PSIThreshold: psi.threshold, Reference: Reference{Window: "7d-matured"}},
			))
			got := findings(t, m)
			res := got[instanceKey("output-mix", "card-fraud", "", "")]
			checkNear(t, "pooled statistic", res.Statistic, c.ChiSquare.Statistic, 1e-9)
			checkNear(t, "pooled p-value", res.PValue, c.ChiSquare.P, 1e-9)
			if res.DF == nil || *res.DF != c.ChiSquare.DF {
				t.Errorf("pooled df = %v, want %d", res.DF, c.ChiSquare.DF)
			}
			checkOutcome(t, "pooled chi-square", res, OutcomeClear)
			res = got[instanceKey("output-psi", "card-fraud", "", "")]
			checkNear(t, "PSI", res.PSI, c.PSI, 1e-9)
			checkOutcome(t, fmt.Sprintf("PSI %.6g against threshold %.6g", c.PSI, psi.threshold), res, psi.want)
		}
	})
}

// TestPoolSparse checks the pooling of sparse classes before a chi-square
// test (Cochran's rule of thumb, expected count at least 5: common
// practice).
func TestPoolSparse(t *testing.T) {
	for _, c := range []struct {
		name         string
		a, b         []int64
		wantA, wantB []int64
	}{
		{"none sparse", []int64{50, 50}, []int64{40, 60}, []int64{50, 50}, []int64{40, 60}},
		{"two sparse pooled", []int64{90, 3, 2, 5}, []int64{90, 4, 3, 3}, []int64{90, 10}, []int64{90, 10}},
		{"sparse pool merged into largest", []int64{60, 30, 1}, []int64{60, 30, 0}, []int64{61, 30}, []int64{60, 30}},
		{"empty classes kept for the test to drop", []int64{50, 0, 50}, []int64{40, 0, 60}, []int64{50, 0, 50}, []int64{40, 0, 60}},
	} {
		t.Run(c.name, func(t *testing.T) {
			a, b := poolSparse(c.a, c.b)
			if fmt.Sprint(a, b) != fmt.Sprint(c.wantA, c.wantB) {
				t.Errorf("poolSparse(%v, %v) = %v, %v; want %v, %v", c.a, c.b, a, b, c.wantA, c.wantB)
			}
		})
	}
}

// TestReferencePeriods checks how the reference is read: a window holding
// the current one is used minus the current one; one that partly overlaps
// it is refused; a fixed range is read from the store.
func TestReferencePeriods(t *testing.T) {
	g := loadGolden(t)
	c := g.Drop[0]
	week := windows.Window{Name: "7d", Length: 168 * time.Hour}
	shifted := windows.Window{Name: "1d-lag12h", Length: 24 * time.Hour, Lag: 12 * time.Hour}
	rule := func(ref Reference) Rule {
		return Rule{Name: "fraud-recall-drop", Kind: KindDrop, Model: "card-fraud", Window: "1d",
			Classes: []string{"fraud"}, Confidence: c.Confidence, Reference: ref}
	}
	key := instanceKey("fraud-recall-drop", "card-fraud", "fraud", "")

	t.Run("nested window", func(t *testing.T) {
		b := setup(t)
		b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(8000, 30, c.N1-c.Fire.X, c.Fire.X), nil)
		// The week holds the day: its counts are the golden reference plus the day's.
		b.views.set(t, "card-fraud", week, binary, binaryRows(68000, 230, c.N2-c.X2+c.N1-c.Fire.X, c.X2+c.Fire.X), nil)
		opts := b.options(rule(Reference{Window: "7d"}))
		opts.Windows = append(opts.Windows, week)
		res := findings(t, b.manager(t, opts))[key]
		if res.Reference == nil || res.Reference.Count != c.N2 {
			t.Fatalf("reference = %+v, want count %d (the week less the day)", res.Reference, c.N2)
		}
		checkNear(t, "p-value", res.PValue, c.Fire.P, 1e-9)
	})

	t.Run("partial overlap", func(t *testing.T) {
		b := setup(t)
		b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(8000, 30, 10, 90), nil)
		b.views.set(t, "card-fraud", shifted, binary, binaryRows(8000, 30, 10, 90), nil)
		opts := b.options(rule(Reference{Window: "1d-lag12h"}))
		opts.Windows = append(opts.Windows, shifted)
		m := b.manager(t, opts)
		err := m.Evaluate(context.Background(), t0)
		if err == nil || !strings.Contains(err.Error(), "partly overlaps") {
			t.Fatalf("Evaluate = %v, want a partial-overlap error", err)
		}
	})

	t.Run("fixed range from the store", func(t *testing.T) {
		b := setup(t)
		ctx := context.Background()
		from := time.Date(2026, 2, 1, 0, 0, 0, 0, time.UTC)
		var preds []store.Prediction
		var labels []store.Label
		for i := range c.N2 {
			at := from.Add(time.Duration(i) * time.Minute)
			predicted := "fraud"
			if i >= c.X2 {
				predicted = "legit"
			}
			id := fmt.Sprintf("txn-%05d", i)
			preds = append(preds, store.Prediction{Model: "card-fraud", ID: id, At: at, Bucket: windows.BucketStart(at, 5*time.Minute), Predicted: predicted})
			labels = append(labels, store.Label{Model: "card-fraud", ID: id, Actual: "fraud", At: at.Add(time.Hour)})
		}
		if _, err := b.st.IngestPredictions(ctx, preds, from); err != nil {
			t.Fatal(err)
		}
		if _, err := b.st.IngestLabels(ctx, labels, from); err != nil {
			t.Fatal(err)
		}
		b.views.set(t, "card-fraud", dayWindow, binary, binaryRows(8000, 30, c.N1-c.Fire.X, c.Fire.X), nil)
		m := b.manager(t, b.options(rule(Reference{From: from, To: from.Add(28 * 24 * time.Hour)})))
		res := findings(t, m)[key]
		if res.Reference == nil || res.Reference.Count != c.N2 {
			t.Fatalf("reference = %+v, want count %d", res.Reference, c.N2)
		}
		checkNear(t, "p-value", res.PValue, c.Fire.P, 1e-9)
		checkOutcome(t, "drop against a fixed range", res, OutcomeMet)
	})
}

// TestSilence checks the silence rule against the model's latest
// prediction time, and a model that never sent one.
func TestSilence(t *testing.T) {
	b := setup(t)
	ctx := context.Background()
	last := t0.Add(-40 * time.Minute)
	if _, err := b.st.IngestPredictions(ctx, []store.Prediction{{Model: "card-fraud", ID: "txn-1", At: last,
		Bucket: windows.BucketStart(last, 5*time.Minute), Predicted: "legit"}}, last); err != nil {
		t.Fatal(err)
	}
	if _, err := b.st.EnsureModel(ctx, "claim-triage", []string{"pay", "review"}, 0); err != nil {
		t.Fatal(err)
	}
	b.now.set(t0.Add(-20 * time.Minute)) // the manager starts 20 minutes before t0
	m := b.manager(t, b.options(Rule{Name: "quiet", Kind: KindNoTraffic, Model: AllModels, QuietFor: 30 * time.Minute}))
	for _, c := range []struct {
		at          time.Time
		fraud, tria Outcome
	}{
		{t0.Add(-15 * time.Minute), OutcomeClear, OutcomeClear}, // 25m since the last prediction
		{t0, OutcomeMet, OutcomeClear},                          // 40m; claim-triage silent 20m since start
		{t0.Add(10 * time.Minute), OutcomeMet, OutcomeMet},      // 30m since start: the limit itself counts
	} {
		models, err := b.st.Models(ctx)
		if err != nil {
			t.Fatal(err)
		}
		fs, _, err := m.rules[0].Evaluate(ctx, m.env(c.at, models))
		if err != nil {
			t.Fatal(err)
		}
		got := map[string]Outcome{}
		for _, f := range fs {
			got[f.Model] = f.Result.Outcome
		}
		if got["card-fraud"] != c.fraud || got["claim-triage"] != c.tria {
			t.Errorf("at %s: card-fraud %s, claim-triage %s; want %s, %s", c.at.Format(time.RFC3339), got["card-fraud"], got["claim-triage"], c.fraud, c.tria)
		}
	}
}

// TestScoreTestReducesToPooled checks that the margin test joins the
// pooled z-test of stats.TwoProportion as the margin goes to zero
// (Farrington & Manning 1990: the restricted estimates become the pooled
// proportion).
func TestScoreTestReducesToPooled(t *testing.T) {
	cur, ref := proportion{84, 100}, proportion{900, 1000}
	c, err := stats.TwoProportion(cur.x, cur.n, ref.x, ref.n, 0.95)
	if err != nil {
		t.Fatal(err)
	}
	if got := scoreLess(cur, ref, 1e-12); !near(got, c.PLess, 1e-9) {
		t.Errorf("score test at margin 1e-12 = %.12g, pooled z-test = %.12g", got, c.PLess)
	}
}

// TestFisherTails checks the exact test far in both tails, where the
// terms underflow, and on a degenerate table.
func TestFisherTails(t *testing.T) {
	for _, c := range []struct {
		p1, p2   proportion
		lo, hi   float64
		describe string
	}{
		{proportion{0, 5000}, proportion{5000, 5000}, 0, 1e-300, "all failures against all successes"},
		{proportion{5000, 5000}, proportion{0, 5000}, 1 - 1e-15, 1, "all successes against all failures"},
		{proportion{0, 100}, proportion{0, 1000}, 1, 1, "no success anywhere"},
		{proportion{500, 1000}, proportion{500, 1000}, 0.5, 0.6, "equal halves"},
	} {
		if got := fisherLess(c.p1, c.p2); !(got >= c.lo && got <= c.hi) {
			t.Errorf("%s: p %g, want in [%g, %g]", c.describe, got, c.lo, c.hi)
		}
	}
}
