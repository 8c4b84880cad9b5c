package windows

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/classwatch/classwatch/windows/stats"
	"github.com/classwatch/classwatch/windows/store"
)

// earlyFile is testdata/early/early.json, written by testdata/early/gen.py
// with numpy 1.24.2, scipy 1.10.1 and scikit-learn 1.2.1 (Debian
// bookworm); the file records the versions.
type earlyFile struct {
	Versions map[string]string `json:"versions"`
	BBSE     []struct {
		Ref        [][]int64 `json:"ref"`
		Current    []int64   `json:"current"`
		Confidence float64   `json:"confidence"`
		Raw        []float64 `json:"raw"`
		Prevalence []float64 `json:"prevalence"`
		SE         []float64 `json:"se"`
		Lo         []float64 `json:"lo"`
		Hi         []float64 `json:"hi"`
	} `json:"bbse"`
	Calibration []struct {
		Classes     []string `json:"classes"`
		Predictions []struct {
			Scores    map[string]float64 `json:"scores"`
			Predicted string             `json:"predicted"`
			Actual    string             `json:"actual"`
		} `json:"predictions"`
		Brier        float64  `json:"brier"`
		BrierSklearn *float64 `json:"brier_sklearn"`
		ECE          float64  `json:"ece"`
		Bins         []struct {
			Count     int64    `json:"count"`
			MeanScore *float64 `json:"mean_score"`
			Accuracy  *float64 `json:"accuracy"`
		} `json:"bins"`
		Curve *struct {
			ProbTrue []float64 `json:"prob_true"`
			ProbPred []float64 `json:"prob_pred"`
		} `json:"calibration_curve"`
	} `json:"calibration"`
}

func within(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

// TestBBSEReference compares stats.BBSE with numpy.linalg.lstsq on the same
// matrices and shares (clipped and renormalised the same way) and with a
// numpy computation of the delta-method interval, to 1e-9: a regular case,
// five classes, a singular matrix (minimum-norm solution) and a mix that
// gives a negative raw component.
func TestBBSEReference(t *testing.T) {
	var f earlyFile
	readJSON(t, "testdata/early/early.json", &f)
	if len(f.BBSE) < 4 {
		t.Fatalf("early.json has %d BBSE cases", len(f.BBSE))
	}
	for i, c := range f.BBSE {
		est, ok, err := stats.BBSE(c.Ref, c.Current, c.Confidence)
		if err != nil || !ok {
			t.Fatalf("case %d: ok %v, err %v", i, ok, err)
		}
		for k := range c.Current {
			for _, v := range []struct {
				what      string
				got, want float64
			}{
				{"raw", est.Raw[k], c.Raw[k]}, {"prevalence", est.Prevalence[k], c.Prevalence[k]},
				{"se", est.SE[k], c.SE[k]}, {"lo", est.Lo[k], c.Lo[k]}, {"hi", est.Hi[k], c.Hi[k]},
			} {
				if !within(v.got, v.want, 1e-9) {
					t.Errorf("case %d class %d %s = %.12g, numpy %.12g", i, k, v.what, v.got, v.want)
				}
			}
		}
	}
}

// scoreSumsOf aggregates predictions as README.md "Early warning" defines
// the stored aggregates (store.ScoreBin bins, a missing class score 0).
func scoreSumsOf(classes []string, preds []struct {
	Scores    map[string]float64 `json:"scores"`
	Predicted string             `json:"predicted"`
	Actual    string             `json:"actual"`
}) *ScoreSums {
	s := NewScoreSums(len(classes))
	for _, p := range preds {
		for k, c := range classes {
			s.Hist[k][store.ScoreBin(p.Scores[c])]++
			y := 0.0
			if c == p.Actual {
				y = 1
			}
			s.BrierSum += (p.Scores[c] - y) * (p.Scores[c] - y)
		}
		s.BrierN++
		top := p.Scores[p.Predicted]
		b := &s.Calib[store.ScoreBin(top)]
		b.N++
		b.ScoreSum += top
		if p.Predicted == p.Actual {
			b.Correct++
		}
	}
	return s
}

// TestCalibrationReference checks the Brier score against numpy's
// multi-class form and, for two classes, 2 × scikit-learn 1.2.1's
// brier_score_loss; the reliability bins and ECE against numpy on the same
// bins, and for two classes the non-empty bins against scikit-learn 1.2.1's
// calibration_curve(strategy="uniform", n_bins=10).
func TestCalibrationReference(t *testing.T) {
	var f earlyFile
	readJSON(t, "testdata/early/early.json", &f)
	for i, c := range f.Calibration {
		s := scoreSumsOf(c.Classes, c.Predictions)
		if b := s.Brier(); b == nil || !within(*b, c.Brier, 1e-12) {
			t.Errorf("case %d: Brier %v, numpy %g", i, b, c.Brier)
		}
		if c.BrierSklearn != nil && !within(*s.Brier(), 2**c.BrierSklearn, 1e-12) {
			t.Errorf("case %d: Brier %g, 2 × brier_score_loss %g", i, *s.Brier(), 2**c.BrierSklearn)
		}
		if e := s.CalibrationError(); e == nil || !within(*e, c.ECE, 1e-12) {
			t.Errorf("case %d: ECE %v, numpy %g", i, e, c.ECE)
		}
		bins := s.Reliability()
		var nonEmpty []ReliabilityBin
		for b, want := range c.Bins {
			got := bins[b]
			if got.Count != want.Count || (got.MeanScore == nil) != (want.MeanScore == nil) {
				t.Fatalf("case %d bin %d: %+v, numpy %+v", i, b, got, want)
			}
			if got.Count == 0 {
				continue
			}
			nonEmpty = append(nonEmpty, got)
			if !within(*got.MeanScore, *want.MeanScore, 1e-12) || !within(*got.Accuracy, *want.Accuracy, 1e-12) {
				t.Errorf("case %d bin %d: mean %g acc %g, numpy %g %g", i, b, *got.MeanScore, *got.Accuracy, *want.MeanScore, *want.Accuracy)
			}
		}
		if c.Curve == nil {
			continue
		}
		if len(nonEmpty) != len(c.Curve.ProbTrue) {
			t.Fatalf("case %d: %d non-empty bins, calibration_curve %d", i, len(nonEmpty), len(c.Curve.ProbTrue))
		}
		for j, b := range nonEmpty {
			if !within(*b.Accuracy, c.Curve.ProbTrue[j], 1e-12) || !within(*b.MeanScore, c.Curve.ProbPred[j], 1e-12) {
				t.Errorf("case %d bin %d: (%g, %g), calibration_curve (%g, %g)", i, j, *b.Accuracy, *b.MeanScore, c.Curve.ProbTrue[j], c.Curve.ProbPred[j])
			}
		}
	}
}

// multinomial draws n items with probabilities p.
func multinomial(rng *rand.Rand, n int, p []float64) []int64 {
	out := make([]int64, len(p))
	for range n {
		u, k := rng.Float64(), 0
		for k < len(p)-1 && u >= p[k] {
			u -= p[k]
			k++
		}
		out[k]++
	}
	return out
}

// TestBBSELabelShiftSimulation draws, under pure label shift, a labeled
// reference of 4,000 predictions from one class mix and a window of 4,000
// unlabeled predictions from another, with the same P(predicted | actual),
// and checks over 400 seeds that the estimate recovers the new mix (mean
// absolute error below 0.02) and that the 95% interval covers each class's
// true prevalence in 92–98% of seeds (nominal 95%; the binomial spread of a
// 400-seed share is about ±2.2 points at 95%).
func TestBBSELabelShiftSimulation(t *testing.T) {
	confusion := [][]float64{{0.85, 0.10, 0.05}, {0.15, 0.75, 0.10}, {0.05, 0.15, 0.80}} // P(predicted | actual)
	refMix, newMix := []float64{0.6, 0.3, 0.1}, []float64{0.3, 0.3, 0.4}
	const seeds, n = 400, 4000
	covered := make([]int, 3)
	var absErr float64
	for seed := range uint64(seeds) {
		rng := rand.New(rand.NewPCG(seed, 99))
		ref := make([][]int64, 3)
		for i, ni := range multinomial(rng, n, refMix) {
			ref[i] = multinomial(rng, int(ni), confusion[i])
		}
		current := make([]int64, 3)
		for i, ni := range multinomial(rng, n, newMix) {
			for j, c := range multinomial(rng, int(ni), confusion[i]) {
				current[j] += c
			}
		}
		est, ok, err := stats.BBSE(ref, current, 0.95)
		if err != nil || !ok {
			t.Fatalf("seed %d: ok %v err %v", seed, ok, err)
		}
		for k := range 3 {
			absErr += math.Abs(est.Prevalence[k] - newMix[k])
			if est.Lo[k] <= newMix[k] && newMix[k] <= est.Hi[k] {
				covered[k]++
			}
		}
	}
	if mae := absErr / (3 * seeds); mae > 0.02 {
		t.Errorf("mean absolute error %.4f, want below 0.02", mae)
	}
	for k, c := range covered {
		share := float64(c) / seeds
		t.Logf("class %d: interval covers the truth in %.1f%% of %d seeds", k, 100*share, seeds)
		if share < 0.92 || share > 0.98 {
			t.Errorf("class %d: coverage %.3f, want 0.92–0.98 around the nominal 0.95", k, share)
		}
	}
}

// TestBBSEUndefined checks the documented undefined cases.
func TestBBSEUndefined(t *testing.T) {
	if _, ok, err := stats.BBSE([][]int64{{5, 1}, {0, 0}}, []int64{3, 3}, 0.95); ok || err != nil {
		t.Errorf("class without reference support: ok %v err %v, want undefined", ok, err)
	}
	if _, ok, err := stats.BBSE([][]int64{{5, 1}, {1, 5}}, []int64{0, 0}, 0.95); ok || err != nil {
		t.Errorf("no predictions: ok %v err %v, want undefined", ok, err)
	}
	if _, _, err := stats.BBSE([][]int64{{5, 1}}, []int64{1, 1}, 0.95); err == nil {
		t.Error("one reference row for two classes: no error")
	}
}
