package windows

import (
	"math"
	"testing"
)

// checkInvariants checks what must hold for any Compute result, whatever
// the counts: every figure finite, ratios in [0, 1] and correlations in
// [−1, 1], a ratio nil exactly when its denominator is zero, intervals
// around their estimates, and counts that add up.
func checkInvariants(t *testing.T, m *Matrix, predicted []int64, got Metrics) {
	t.Helper()
	unit := func(what string, v *float64, defined bool, lo float64) {
		t.Helper()
		switch {
		case v == nil && defined:
			t.Errorf("%s = nil with a non-zero denominator", what)
		case v != nil && !defined:
			t.Errorf("%s = %g with a zero denominator, want nil", what, *v)
		case v != nil && (math.IsNaN(*v) || math.IsInf(*v, 0) || *v < lo || *v > 1):
			t.Errorf("%s = %g outside [%g, 1]", what, *v, lo)
		}
	}
	interval := func(what string, iv *Interval, v *float64) {
		t.Helper()
		switch {
		case (iv == nil) != (v == nil):
			t.Errorf("%s = %v for estimate %v", what, iv, v)
		case iv != nil && !(0 <= iv.Lo && iv.Lo <= *v+1e-15 && *v-1e-15 <= iv.Hi && iv.Hi <= 1):
			t.Errorf("%s = [%g, %g] does not hold %g within [0, 1]", what, iv.Lo, iv.Hi, *v)
		}
	}
	n := m.Total()
	var preds int64
	if predicted == nil {
		preds = n
	} else {
		for _, c := range predicted {
			preds += c
		}
	}
	if got.Labeled != n || got.Predictions != preds {
		t.Errorf("Labeled %d, Predictions %d; want %d, %d", got.Labeled, got.Predictions, n, preds)
	}
	unit("Accuracy", got.Accuracy, n > 0, 0)
	unit("LabelCoverage", got.LabelCoverage, preds > 0, 0)
	var support, predictedSum int64
	anySupport, anyPresent := false, false
	for k, c := range got.PerClass {
		row, col := m.Row(k), m.Col(k)
		if c.Support != row || c.TP+c.FN != row || c.TP+c.FP != col || c.TP+c.FP+c.FN+c.TN != n {
			t.Errorf("class %s: support %d TP %d FP %d FN %d TN %d do not add up (row %d, column %d, total %d)",
				c.Class, c.Support, c.TP, c.FP, c.FN, c.TN, row, col, n)
		}
		support += c.Support
		predictedSum += c.PredictedCount
		anySupport = anySupport || row > 0
		anyPresent = anyPresent || row > 0 || col > 0
		unit("Recall["+c.Class+"]", c.Recall, row > 0, 0)
		unit("Precision["+c.Class+"]", c.Precision, col > 0, 0)
		unit("Specificity["+c.Class+"]", c.Specificity, n-row > 0, 0)
		unit("F1["+c.Class+"]", c.F1, row > 0 || col > 0, 0)
		unit("Prevalence["+c.Class+"]", c.Prevalence, n > 0, 0)
		unit("PredictedShare["+c.Class+"]", c.PredictedShare, preds > 0, 0)
		interval("RecallInterval["+c.Class+"]", c.RecallInterval, c.Recall)
		interval("PrecisionInterval["+c.Class+"]", c.PrecisionInterval, c.Precision)
		interval("SpecificityInterval["+c.Class+"]", c.SpecificityInterval, c.Specificity)
	}
	if support != n || predictedSum != preds {
		t.Errorf("supports add to %d, predicted counts to %d; want %d, %d", support, predictedSum, n, preds)
	}
	unit("BalancedAccuracy", got.BalancedAccuracy, anySupport, 0)
	unit("MacroF1", got.MacroF1, anyPresent, 0)
	if got.MCC != nil {
		unit("MCC", got.MCC, true, -1)
	}
	if got.Kappa != nil {
		unit("Kappa", got.Kappa, true, -1)
	}
}

func TestComputeMajorityOnly(t *testing.T) {
	// A classifier that only ever predicts the majority class scores the
	// majority's share as accuracy and exactly 0.5 balanced accuracy on two
	// classes (common practice; follows from the definitions: recall 1 for
	// the majority, 0 for the minority).
	for _, c := range []struct{ majority, minority int64 }{
		{99, 1}, {9900, 100}, {1, 1}, {3, 1}, {999_999_999, 1}, {1 << 40, 12345},
	} {
		m := NewMatrix([]string{"legit", "fraud"})
		m.Add(0, 0, c.majority)
		m.Add(1, 0, c.minority)
		got := Compute(m, nil, 0.95)
		checkInvariants(t, m, nil, got)
		if got.BalancedAccuracy == nil || *got.BalancedAccuracy != 0.5 {
			t.Errorf("%d/%d: balanced accuracy %v, want exactly 0.5", c.majority, c.minority, got.BalancedAccuracy)
		}
		want := float64(c.majority) / float64(c.majority+c.minority)
		if got.Accuracy == nil || *got.Accuracy != want {
			t.Errorf("%d/%d: accuracy %v, want %g", c.majority, c.minority, got.Accuracy, want)
		}
		// No skill: kappa 0; MCC undefined since one class is never predicted.
		if got.Kappa == nil || *got.Kappa != 0 || got.MCC != nil {
			t.Errorf("%d/%d: kappa %v, MCC %v; want 0 and nil", c.majority, c.minority, got.Kappa, got.MCC)
		}
		if fraud := got.PerClass[1]; fraud.Precision != nil || *fraud.Recall != 0 || *fraud.F1 != 0 {
			t.Errorf("%d/%d: minority precision %v, recall %v, F1 %v; want nil, 0, 0", c.majority, c.minority, fraud.Precision, *fraud.Recall, *fraud.F1)
		}
	}
}

func TestComputePerfect(t *testing.T) {
	m := NewMatrix([]string{"a", "b", "c"})
	m.Add(0, 0, 7)
	m.Add(1, 1, 1)
	m.Add(2, 2, 1000)
	got := Compute(m, nil, 0.95)
	checkInvariants(t, m, nil, got)
	// A perfect classifier has every figure at 1 (follows from the definitions).
	for _, v := range []*float64{got.Accuracy, got.BalancedAccuracy, got.MacroF1, got.MCC, got.Kappa, got.LabelCoverage} {
		if v == nil || *v != 1 {
			t.Errorf("perfect classifier: figure %v, want 1", v)
		}
	}
	for _, c := range got.PerClass {
		if *c.Recall != 1 || *c.Precision != 1 || *c.Specificity != 1 || *c.F1 != 1 || c.RecallInterval.Hi != 1 {
			t.Errorf("class %s: %+v", c.Class, c)
		}
	}
}

func TestComputeLabelShift(t *testing.T) {
	// Under label shift with a fixed classifier, recall and specificity stay
	// put while precision follows prevalence (common practice; follows from
	// the definitions). Scaling row 1 by 10 is such a shift.
	base := NewMatrix([]string{"ok", "defect"})
	base.Add(0, 0, 900)
	base.Add(0, 1, 100)
	base.Add(1, 0, 20)
	base.Add(1, 1, 80)
	shifted := base.Clone()
	shifted.Add(1, 0, 9*20)
	shifted.Add(1, 1, 9*80)
	b, s := Compute(base, nil, 0.95).PerClass[1], Compute(shifted, nil, 0.95).PerClass[1]
	if *b.Recall != *s.Recall || *b.Specificity != *s.Specificity {
		t.Errorf("recall %g→%g, specificity %g→%g; want unchanged", *b.Recall, *s.Recall, *b.Specificity, *s.Specificity)
	}
	if !(*s.Precision > *b.Precision) {
		t.Errorf("precision %g→%g; want higher at higher prevalence", *b.Precision, *s.Precision)
	}
}

func TestComputeUnlabeledPredictions(t *testing.T) {
	m := NewMatrix([]string{"billing", "outage", "other"})
	m.Add(0, 0, 30)
	m.Add(1, 0, 10)
	m.Add(2, 2, 20)
	// 60 labeled plus 40 unlabeled predictions: 20 billing, 0 outage, 20 other.
	predicted := []int64{m.Col(0) + 20, m.Col(1), m.Col(2) + 20}
	got := Compute(m, predicted, 0.95)
	checkInvariants(t, m, predicted, got)
	if got.Predictions != 100 || got.Labeled != 60 || *got.LabelCoverage != 0.6 {
		t.Errorf("predictions %d, labeled %d, coverage %g; want 100, 60, 0.6", got.Predictions, got.Labeled, *got.LabelCoverage)
	}
	for k, want := range []float64{0.6, 0, 0.4} {
		if s := got.PerClass[k].PredictedShare; s == nil || *s != want {
			t.Errorf("predicted share of %s = %v, want %g", got.PerClass[k].Class, s, want)
		}
	}
	// Labeled-only figures do not depend on the unlabeled predictions.
	labeledOnly := Compute(m, nil, 0.95)
	if *labeledOnly.Accuracy != *got.Accuracy || *labeledOnly.PerClass[0].Precision != *got.PerClass[0].Precision {
		t.Error("unlabeled predictions changed a labeled-only figure")
	}
	if *labeledOnly.LabelCoverage != 1 || labeledOnly.Predictions != 60 {
		t.Errorf("nil predicted: coverage %g, predictions %d; want 1, 60", *labeledOnly.LabelCoverage, labeledOnly.Predictions)
	}
}

func TestComputeEmpty(t *testing.T) {
	for _, classes := range [][]string{nil, {"a"}, {"a", "b", "c"}} {
		m := NewMatrix(classes)
		got := Compute(m, nil, 0.95)
		checkInvariants(t, m, nil, got)
		if got.Accuracy != nil || got.MCC != nil || got.Kappa != nil || got.MacroF1 != nil || got.LabelCoverage != nil {
			t.Errorf("%v: an empty matrix has defined figures: %+v", classes, got)
		}
	}
	// Predictions without labels: shares and coverage (0) are defined.
	m := NewMatrix([]string{"a", "b"})
	got := Compute(m, []int64{3, 1}, 0.95)
	checkInvariants(t, m, []int64{3, 1}, got)
	if *got.LabelCoverage != 0 || *got.PerClass[0].PredictedShare != 0.75 {
		t.Errorf("coverage %v, share %v; want 0, 0.75", got.LabelCoverage, got.PerClass[0].PredictedShare)
	}
}

func TestComputeInvalidConfidence(t *testing.T) {
	m := NewMatrix([]string{"a", "b"})
	m.Add(0, 0, 3)
	m.Add(1, 0, 2)
	for _, conf := range []float64{0, 1, -1, 95, math.NaN()} {
		got := Compute(m, nil, conf)
		if c := got.PerClass[0]; c.Recall == nil || c.RecallInterval != nil || c.PrecisionInterval != nil {
			t.Errorf("confidence %g: recall %v, intervals %v %v; want recall, no intervals", conf, c.Recall, c.RecallInterval, c.PrecisionInterval)
		}
	}
}

func TestComputePredictedLengthPanics(t *testing.T) {
	defer func() {
		if recover() == nil {
			t.Error("Compute with a short predicted slice did not panic")
		}
	}()
	Compute(NewMatrix([]string{"a", "b"}), []int64{1}, 0.95)
}
