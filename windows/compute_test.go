package windows

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"strconv"
	"testing"
)

// refMetrics is the "want" block gen.py writes for one matrix: every figure
// Compute returns, from scikit-learn 1.2.1, statsmodels 0.13.5 and numpy
// (see gen.py for which figure comes from which function). Null is an
// undefined ratio.
type refMetrics struct {
	CM                  [][]int64     `json:"cm"`
	TP                  []int64       `json:"tp"`
	FP                  []int64       `json:"fp"`
	FN                  []int64       `json:"fn"`
	TN                  []int64       `json:"tn"`
	Support             []int64       `json:"support"`
	Predictions         int64         `json:"predictions"`
	Labeled             int64         `json:"labeled"`
	Precision           []*float64    `json:"precision"`
	Recall              []*float64    `json:"recall"`
	F1                  []*float64    `json:"f1"`
	Specificity         []*float64    `json:"specificity"`
	Prevalence          []*float64    `json:"prevalence"`
	PredictedShare      []*float64    `json:"predicted_share"`
	Accuracy            *float64      `json:"accuracy"`
	BalancedAccuracy    *float64      `json:"balanced_accuracy"`
	MacroF1             *float64      `json:"macro_f1"`
	LabelCoverage       *float64      `json:"label_coverage"`
	MCC                 *float64      `json:"mcc"`
	Kappa               *float64      `json:"kappa"`
	RecallInterval      []*[2]float64 `json:"recall_interval"`
	PrecisionInterval   []*[2]float64 `json:"precision_interval"`
	SpecificityInterval []*[2]float64 `json:"specificity_interval"`
}

type refCase struct {
	Name       string  `json:"name"`
	Classes    int     `json:"classes"`
	Confidence float64 `json:"confidence"`
	// Events are (actual, predicted, count) triples; Unlabeled, when
	// present, counts per class the predictions that have no label.
	Events    [][3]int64 `json:"events"`
	Unlabeled []int64    `json:"unlabeled"`
	Want      refMetrics `json:"want"`
}

func readJSON(t *testing.T, path string, v any) {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(raw, v); err != nil {
		t.Fatalf("decode %s: %v", path, err)
	}
}

func classNames(k int) []string {
	names := make([]string, k)
	for i := range names {
		names[i] = "c" + strconv.Itoa(i)
	}
	return names
}

func TestComputeReference(t *testing.T) {
	var ref struct {
		Versions map[string]string `json:"versions"`
		Cases    []refCase         `json:"cases"`
	}
	readJSON(t, "testdata/reference/metrics.json", &ref)
	if ref.Versions["scikit-learn"] == "" || ref.Versions["statsmodels"] == "" {
		t.Fatalf("metrics.json records no library versions: %v", ref.Versions)
	}
	if len(ref.Cases) < 200 {
		t.Fatalf("metrics.json has %d cases, want at least 200", len(ref.Cases))
	}
	for _, c := range ref.Cases {
		t.Run(c.Name, func(t *testing.T) {
			m := NewMatrix(classNames(c.Classes))
			for _, e := range c.Events {
				m.Add(int(e[0]), int(e[1]), e[2])
			}
			var predicted []int64
			if c.Unlabeled != nil {
				predicted = make([]int64, c.Classes)
				for k := range predicted {
					predicted[k] = m.Col(k) + c.Unlabeled[k]
				}
			}
			checkMetrics(t, m, Compute(m, predicted, c.Confidence), c.Want)
		})
	}
}

func TestComputeDigits(t *testing.T) {
	// A real classifier on real data: scikit-learn's LogisticRegression on
	// its bundled copy of the UCI handwritten digits (load_digits), test
	// split predictions and metrics written by gen.py.
	var ref struct {
		Classes    []string   `json:"classes"`
		Confidence float64    `json:"confidence"`
		YTrue      []int      `json:"y_true"`
		YPred      []int      `json:"y_pred"`
		Want       refMetrics `json:"want"`
	}
	readJSON(t, "testdata/reference/digits.json", &ref)
	if len(ref.YTrue) == 0 || len(ref.YTrue) != len(ref.YPred) {
		t.Fatalf("digits.json: %d labels, %d predictions", len(ref.YTrue), len(ref.YPred))
	}
	m := NewMatrix(ref.Classes)
	for i := range ref.YTrue {
		if err := m.AddNamed(ref.Classes[ref.YTrue[i]], ref.Classes[ref.YPred[i]], 1); err != nil {
			t.Fatal(err)
		}
	}
	checkMetrics(t, m, Compute(m, nil, ref.Confidence), ref.Want)
}

// Tolerances: 1e-12 relative, with an absolute floor of 1e-15 for figures
// that are zero or the result of cancellation, where relative error means
// nothing (statsmodels' Wilson bound for 0 successes is ±1e-18, not 0).
const (
	relTol = 1e-12
	absTol = 1e-15
)

func near(got, want float64) bool {
	return math.Abs(got-want) <= max(relTol*math.Abs(want), absTol)
}

// checkRatio compares an optional ratio with the reference, null for null.
func checkRatio(t *testing.T, what string, got, want *float64) {
	t.Helper()
	switch {
	case got == nil && want == nil:
	case got == nil:
		t.Errorf("%s = nil, want %.17g", what, *want)
	case want == nil:
		t.Errorf("%s = %.17g, want nil (undefined)", what, *got)
	case !near(*got, *want):
		t.Errorf("%s = %.17g, want %.17g", what, *got, *want)
	}
}

func checkInterval(t *testing.T, what string, got *Interval, want *[2]float64) {
	t.Helper()
	switch {
	case got == nil && want == nil:
	case got == nil || want == nil:
		t.Errorf("%s = %v, want %v", what, got, want)
	case !near(got.Lo, want[0]) || !near(got.Hi, want[1]):
		t.Errorf("%s = [%.17g, %.17g], want [%.17g, %.17g]", what, got.Lo, got.Hi, want[0], want[1])
	}
}

func checkCount(t *testing.T, what string, got, want int64) {
	t.Helper()
	if got != want {
		t.Errorf("%s = %d, want %d", what, got, want)
	}
}

func checkMetrics(t *testing.T, m *Matrix, got Metrics, want refMetrics) {
	t.Helper()
	// source: scikit-learn 1.2.1 confusion_matrix(labels=all classes)
	if g, w := fmt.Sprint(m.Dense()), fmt.Sprint(want.CM); g != w {
		t.Errorf("matrix = %s, want %s", g, w)
	}
	// source: numpy 1.24.2 sums (from the definitions; no library function)
	checkCount(t, "Predictions", got.Predictions, want.Predictions)
	checkCount(t, "Labeled", got.Labeled, want.Labeled)
	checkRatio(t, "LabelCoverage", got.LabelCoverage, want.LabelCoverage)
	// source: scikit-learn 1.2.1 accuracy_score
	checkRatio(t, "Accuracy", got.Accuracy, want.Accuracy)
	// source: scikit-learn 1.2.1 balanced_accuracy_score (adjusted=False)
	checkRatio(t, "BalancedAccuracy", got.BalancedAccuracy, want.BalancedAccuracy)
	// source: scikit-learn 1.2.1 f1_score(average='macro', labels=classes on either axis, zero_division=0)
	checkRatio(t, "MacroF1", got.MacroF1, want.MacroF1)
	// source: scikit-learn 1.2.1 matthews_corrcoef (its 0 for a constant axis is null in the file)
	checkRatio(t, "MCC", got.MCC, want.MCC)
	// source: scikit-learn 1.2.1 cohen_kappa_score (its NaN is null in the file)
	checkRatio(t, "Kappa", got.Kappa, want.Kappa)

	if len(got.PerClass) != m.Len() {
		t.Fatalf("%d per-class entries, want %d", len(got.PerClass), m.Len())
	}
	for k, c := range got.PerClass {
		if c.Class != m.Classes()[k] {
			t.Errorf("PerClass[%d].Class = %q, want %q", k, c.Class, m.Classes()[k])
		}
		name := func(s string) string { return fmt.Sprintf("%s[%s]", s, c.Class) }
		// source: scikit-learn 1.2.1 multilabel_confusion_matrix
		checkCount(t, name("TP"), c.TP, want.TP[k])
		checkCount(t, name("FP"), c.FP, want.FP[k])
		checkCount(t, name("FN"), c.FN, want.FN[k])
		checkCount(t, name("TN"), c.TN, want.TN[k])
		// source: scikit-learn 1.2.1 precision_recall_fscore_support(average=None);
		// null where zero_division=0 and =1 disagree
		checkCount(t, name("Support"), c.Support, want.Support[k])
		checkRatio(t, name("Precision"), c.Precision, want.Precision[k])
		checkRatio(t, name("Recall"), c.Recall, want.Recall[k])
		checkRatio(t, name("F1"), c.F1, want.F1[k])
		// source: scikit-learn 1.2.1 recall_score of the one-vs-rest negative class
		checkRatio(t, name("Specificity"), c.Specificity, want.Specificity[k])
		// source: numpy 1.24.2 (from the definitions; no library function)
		checkRatio(t, name("Prevalence"), c.Prevalence, want.Prevalence[k])
		checkRatio(t, name("PredictedShare"), c.PredictedShare, want.PredictedShare[k])
		// source: statsmodels 0.13.5 proportion_confint(method='wilson')
		checkInterval(t, name("RecallInterval"), c.RecallInterval, want.RecallInterval[k])
		checkInterval(t, name("PrecisionInterval"), c.PrecisionInterval, want.PrecisionInterval[k])
		checkInterval(t, name("SpecificityInterval"), c.SpecificityInterval, want.SpecificityInterval[k])
	}
}

// BenchmarkCompute computes every metric of a fully populated matrix; the
// cost grows with the number of cells (k²) plus a Wilson interval per class
// and figure.
func BenchmarkCompute(b *testing.B) {
	for _, k := range []int{2, 12, 100} {
		b.Run(fmt.Sprintf("classes=%d", k), func(b *testing.B) {
			m := NewMatrix(classNames(k))
			for a := range k {
				for p := range k {
					n := int64((a*31 + p*17) % 23)
					if a == p {
						n += 500
					}
					m.Add(a, p, n)
				}
			}
			predicted := make([]int64, k)
			for c := range predicted {
				predicted[c] = m.Col(c) + int64(c%5)
			}
			b.ReportAllocs()
			for b.Loop() {
				Compute(m, predicted, 0.95)
			}
		})
	}
}
