package alerts

import (
	"testing"
	"time"
)

func TestSummary(t *testing.T) {
	last := t0.Add(-45 * time.Minute)
	ref := &Figures{Value: ptr(0.9), Count: 1000}
	for _, c := range []struct {
		a    Alert
		want string
	}{
		{Alert{Kind: KindFloor, Model: "card-fraud", Class: "fraud", Window: "1d", Metric: "recall",
			Result: Result{Value: ptr(0.4), Count: 100, Interval: &[2]float64{0.3094, 0.498}, Threshold: ptr(0.8), Confidence: 0.95}},
			"recall of fraud on card-fraud over 1d: 0.4 (95% interval 0.3094–0.498, n=100); floor 0.8"},
		{Alert{Kind: KindCeiling, Model: "card-fraud", Window: "1d", Metric: "mcc",
			Result: Result{Value: ptr(-0.2), Count: 500, Threshold: ptr(-0.1)}},
			"mcc of card-fraud over 1d: -0.2 (n=500); ceiling -0.1"},
		{Alert{Kind: KindDrop, Model: "card-fraud", Class: "fraud", Window: "1d", Metric: "recall",
			Result: Result{Value: ptr(0.84), Count: 100, Reference: ref, PValue: ptr(0.0312588), Margin: ptr(0.0)}},
			"recall of fraud on card-fraud over 1d: 0.84 (n=100) against 0.9 (n=1000) in the reference; one-sided p=0.0313, margin 0"},
		{Alert{Kind: KindConfusionRise, Model: "card-fraud", Class: "fraud", Predicted: "legit", Window: "1d",
			Result: Result{Value: ptr(0.09), Count: 100, Reference: &Figures{Value: ptr(0.05), Count: 1000}, PValue: ptr(0.045), Margin: ptr(0.0)}},
			"share of fraud predicted as legit on card-fraud over 1d: 0.09 (n=100) against 0.05 (n=1000) in the reference; one-sided p=0.045, margin 0"},
		{Alert{Kind: KindOutputShift, Model: "card-fraud", Window: "1h",
			Result: Result{Value: ptr(0.31), PSI: ptr(0.31), Count: 200, Reference: &Figures{Count: 1000}}},
			"predicted-class mix of card-fraud over 1h against the reference (n=200 vs 1000): PSI=0.31"},
		{Alert{Kind: KindNoTraffic, Model: "card-fraud",
			Result: Result{Value: ptr(2700.0), Threshold: ptr(1800.0), LastPrediction: &last}},
			"last prediction from card-fraud at 2026-03-01T11:15:00Z (45m0s ago); limit 30m0s"},
		{Alert{Rule: "recall-drop", Kind: KindDrop, Model: "card-fraud", Class: "fraud", Window: "1d",
			Result: Result{Outcome: OutcomeUnknown, Reason: "n=12 now and 1000 in the reference; min_count is 30"}},
			"recall-drop fraud on card-fraud: n=12 now and 1000 in the reference; min_count is 30"},
	} {
		if got := summary(&c.a); got != c.want {
			t.Errorf("summary of %s:\n got %s\nwant %s", c.a.Kind, got, c.want)
		}
	}
}
