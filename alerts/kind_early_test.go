package alerts

import (
	"context"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
)

// viewSource is a Source of hand-set views only.
type viewSource struct{ v *views }

func (s viewSource) View(model, window string) (windows.View, bool) { return s.v.View(model, window) }

func (s viewSource) Counts(context.Context, store.Query) (store.Counts, error) {
	return store.Counts{}, nil
}

func (s viewSource) Watermark(string) (time.Time, bool) { return t0, true }

// setScored installs a view like views.set, with score aggregates.
func (v *views) setScored(tb testing.TB, model string, win windows.Window, classes []string, rows [][]int64, pred []int64, scores *windows.ScoreSums) {
	tb.Helper()
	v.set(tb, model, win, classes, rows, pred)
	v.mu.Lock()
	defer v.mu.Unlock()
	view := v.m[[2]string{model, win.Name}]
	view.Scores = scores
	v.m[[2]string{model, win.Name}] = view
}

// evalOne compiles r and evaluates it at t0 for its model with classes.
func evalOne(tb testing.TB, r Rule, src Source, classes []string) []Finding {
	tb.Helper()
	cs, err := CompileRules([]Rule{r})
	if err != nil {
		tb.Fatal(err)
	}
	fs, _, err := cs[0].Evaluate(context.Background(), Env{Source: src, At: t0, Confidence: 0.95,
		Models: []store.ModelInfo{{Name: r.Model, Classes: classes, LatestAt: t0}}})
	if err != nil {
		tb.Fatal(err)
	}
	return fs
}

// The simulated model of the label-shift tests: three support-desk queues
// and the fixed P(predicted | actual) of its router (invented figures).
var (
	queues   = []string{"billing", "cards", "other"}
	confuse  = [][]float64{{0.85, 0.10, 0.05}, {0.08, 0.80, 0.12}, {0.10, 0.15, 0.75}}
	refPrior = []float64{0.5, 0.3, 0.2}
)

// sampleShift draws a reference of nRef labeled predictions under
// refPrior and a window of n predictions under prior, and returns the
// reference's matrix rows and the window's predicted counts.
func sampleShift(rng *rand.Rand, nRef, n int, prior []float64) ([][]int64, []int64) {
	draw := func(p []float64) int {
		u := rng.Float64()
		for i, x := range p {
			if u < x {
				return i
			}
			u -= x
		}
		return len(p) - 1
	}
	rows := [][]int64{make([]int64, 3), make([]int64, 3), make([]int64, 3)}
	for range nRef {
		a := draw(refPrior)
		rows[a][draw(confuse[a])]++
	}
	pred := make([]int64, 3)
	for range n {
		pred[draw(confuse[draw(prior)])]++
	}
	return rows, pred
}

// TestEstimatedShiftSimulation checks the estimated_prevalence_shift rule
// by simulation under pure label shift (fixed P(predicted | actual)): with
// no shift, the share of windows in which any class fires stays at or
// below the level (5%, Benjamini–Hochberg across the three classes
// controls it under the global null); after a shift of the mix it fires
// in most windows.
func TestEstimatedShiftSimulation(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 5))
	r := Rule{Name: "mix-estimate", Kind: KindEstimatedPrevalenceShift, Model: "router", Window: "1d",
		Reference: Reference{Window: "7d-matured"}}
	const seeds = 1500
	fired := func(prior []float64) int {
		n := 0
		for range seeds {
			rows, pred := sampleShift(rng, 2000, 1000, prior)
			v := newViews()
			v.set(t, "router", dayWindow, queues, [][]int64{{0, 0, 0}, {0, 0, 0}, {0, 0, 0}}, pred)
			v.set(t, "router", weekWindow, queues, rows, nil)
			for _, f := range evalOne(t, r, viewSource{v}, queues) {
				if f.Result.Outcome == OutcomeMet {
					n++
					break
				}
			}
		}
		return n
	}
	null := fired(refPrior)
	rate := float64(null) / seeds
	// 3 binomial standard errors above the 5% level.
	if limit := 0.05 + 3*math.Sqrt(0.05*0.95/seeds); rate > limit {
		t.Errorf("no shift: fired in %.1f%% of windows, above the 5%% level (limit %.1f%%)", 100*rate, 100*limit)
	}
	power := float64(fired([]float64{0.35, 0.45, 0.2})) / seeds
	if power < 0.9 {
		t.Errorf("a shift of billing 0.5 → 0.35 and cards 0.3 → 0.45 fired in only %.1f%% of windows", 100*power)
	}
	t.Logf("false alarms %.2f%% of %d windows; detection %.1f%%", 100*rate, seeds, 100*power)
}

func TestEstimatedShiftResult(t *testing.T) {
	v := newViews()
	ref := [][]int64{{850, 100, 50}, {48, 480, 72}, {40, 60, 300}} // 1,000 / 600 / 400
	v.set(t, "router", weekWindow, queues, ref, nil)
	// The window's mix is the reference's mix pushed through the same
	// confusion: the estimate is the reference prevalence exactly.
	v.set(t, "router", dayWindow, queues, [][]int64{{0, 0, 0}, {0, 0, 0}, {0, 0, 0}}, []int64{938, 640, 422})
	r := Rule{Name: "mix-estimate", Kind: KindEstimatedPrevalenceShift, Model: "router", Window: "1d",
		Reference: Reference{Window: "7d-matured"}, Classes: []string{"billing"}}
	fs := evalOne(t, r, viewSource{v}, queues)
	if len(fs) != 1 {
		t.Fatalf("findings %+v", fs)
	}
	res := fs[0].Result
	if res.Outcome != OutcomeClear || !near(*res.Value, 0.5, 1e-9) || !near(*res.Reference.Value, 0.5, 1e-12) || res.Count != 2000 || *res.PValue < 0.99 {
		t.Errorf("result %+v; want clear, estimate 0.5 = reference 0.5, n=2000", res)
	}
	if s := summary(&Alert{Kind: KindEstimatedPrevalenceShift, Model: "router", Class: "billing", Window: "1d", Result: res}); !strings.HasPrefix(s, "estimated prevalence of billing on router over 1d (from 2000 predictions, no labels): 0.5") {
		t.Errorf("summary %q", s)
	}
}

// scoreSums returns sums over two classes whose class-1 histogram is h
// (class 0 mirrored) and with the given calibration bins.
func scoreSums(h [10]int64, calib map[int]windows.CalibrationBin) *windows.ScoreSums {
	s := windows.NewScoreSums(2)
	s.Hist[1] = h
	for b := range h {
		s.Hist[0][9-b] = h[b]
	}
	for b, c := range calib {
		s.Calib[b] = c
		s.BrierN += c.N
	}
	return s
}

func TestScoreShiftRule(t *testing.T) {
	ref := [10]int64{400, 200, 100, 60, 40, 40, 40, 40, 40, 40}
	same := [10]int64{200, 100, 50, 30, 20, 20, 20, 20, 20, 20}
	moved := [10]int64{120, 80, 60, 50, 50, 50, 50, 60, 80, 100}
	r := Rule{Name: "fraud-scores", Kind: KindScoreShift, Model: "card-fraud", Window: "1d",
		Reference: Reference{Window: "7d-matured"}, Classes: []string{"fraud"}, Threshold: 0.1}
	for _, c := range []struct {
		cur  [10]int64
		want Outcome
	}{{same, OutcomeClear}, {moved, OutcomeMet}} {
		v := newViews()
		rows := binaryRows(1, 0, 0, 1)
		v.setScored(t, "card-fraud", weekWindow, binary, rows, nil, scoreSums(ref, nil))
		v.setScored(t, "card-fraud", dayWindow, binary, rows, nil, scoreSums(c.cur, nil))
		// The matured week ends 72h before the day begins: the two are
		// disjoint and compared as set.
		res := evalOne(t, r, viewSource{v}, binary)[0].Result
		if res.Outcome != c.want || res.Value == nil || res.PValue == nil || res.Count != sum(c.cur[:]) || res.Reference.Count != 1000 {
			t.Errorf("histogram %v: %+v; want %s", c.cur, res, c.want)
		}
	}
	v := newViews()
	v.set(t, "card-fraud", weekWindow, binary, binaryRows(1, 0, 0, 1), nil)
	v.set(t, "card-fraud", dayWindow, binary, binaryRows(1, 0, 0, 1), nil)
	if res := evalOne(t, r, viewSource{v}, binary)[0].Result; res.Outcome != OutcomeUnknown {
		t.Errorf("without score aggregates: %+v; want unknown", res)
	}
}

// TestCalibrationCeiling: a ceiling on the expected calibration error
// (interval none: it is not a proportion) fires when the predicted
// class's scores promise more than the labels deliver.
func TestCalibrationCeiling(t *testing.T) {
	r := Rule{Name: "calibration", Kind: KindCeiling, Model: "card-fraud", Window: "1d", Metric: "calibration_error",
		Threshold: 0.1, Interval: IntervalNone}
	for _, c := range []struct {
		correct int64
		want    Outcome
		ece     float64
	}{{70, OutcomeMet, 0.25}, {94, OutcomeClear, 0.01}} {
		v := newViews()
		// 100 labeled scored predictions in the top bin, mean score 0.95.
		calib := map[int]windows.CalibrationBin{9: {N: 100, ScoreSum: 95, Correct: c.correct}}
		v.setScored(t, "card-fraud", dayWindow, binary, binaryRows(60, 0, 0, 40), nil, scoreSums([10]int64{}, calib))
		res := evalOne(t, r, viewSource{v}, binary)[0].Result
		if res.Outcome != c.want || !near(*res.Value, c.ece, 1e-12) || res.Count != 100 {
			t.Errorf("correct %d of 100: %+v; want %s at ECE %g", c.correct, res, c.want, c.ece)
		}
	}
}

func TestParseEarlyWarningRules(t *testing.T) {
	rules, err := ParseRules(parseSection(t, `
alerts:
  - name: queue-mix-estimate
    kind: estimated_prevalence_shift
    model: ticket-router
    window: 1d
    reference: {window: 7d-matured}
    margin: 0.05
  - name: fraud-score-shift
    kind: score_shift
    model: card-fraud
    window: 1d
    classes: [fraud]
    reference: {window: 7d-matured}
    threshold: 0.1
  - name: calibration
    kind: ceiling
    model: card-fraud
    window: 1d
    metric: calibration_error
    interval: none
    threshold: 0.08
`, "alerts"))
	if err != nil {
		t.Fatal(err)
	}
	if rules[0].Margin != 0.05 || rules[1].Test != TestChiSquare || rules[1].Threshold != 0.1 || rules[2].Metric != "calibration_error" {
		t.Errorf("rules %+v", rules)
	}
	for _, c := range []struct{ yaml, want string }{
		{"kind: score_shift\n    window: 1d\n    reference: {window: w}\n    threshold: 0.9", `threshold: 0.9: a Jensen–Shannon distance lies between 0 and 0.8326`},
		{"kind: score_shift\n    window: 1d\n    reference: {window: w}\n    test: none", `threshold: required when test is none`},
		{"kind: estimated_prevalence_shift\n    window: 1d", `reference: required`},
		{"kind: estimated_prevalence_shift\n    window: 1d\n    reference: {window: w}\n    threshold: 0.1", `threshold: does not apply to kind estimated_prevalence_shift`},
	} {
		_, err := ParseRules(parseSection(t, "alerts:\n  - name: r\n    model: m\n    "+c.yaml+"\n", "alerts"))
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%q: error %v, want %q", c.yaml, err, c.want)
		}
	}
}

// TestBoundRange: a floor or ceiling threshold must lie in the metric's
// range, which is not [0, 1] for every metric.
func TestBoundRange(t *testing.T) {
	for _, c := range []struct {
		metric    string
		threshold float64
		ok        bool
	}{{"brier", 1.5, true}, {"brier", 2.5, false}, {"score_shift", 0.5, true}, {"score_shift", 0.9, false}, {"mcc", -0.5, true}, {"recall", 1.2, false}} {
		_, err := CompileRules([]Rule{{Name: "r", Kind: KindCeiling, Model: "m", Window: "1d", Metric: c.metric, Threshold: c.threshold, Interval: IntervalNone}})
		if (err == nil) != c.ok {
			t.Errorf("ceiling %g on %s: %v; want ok %v", c.threshold, c.metric, err, c.ok)
		}
	}
}
