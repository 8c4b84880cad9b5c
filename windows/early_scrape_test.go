package windows_test

import (
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/stats"
	"github.com/classwatch/classwatch/windows/store"
)

// earlyTracker holds a fictional clinic's triage model with a matured
// reference window: labeled predictions with scores in the reference, and
// a recent window whose predicted mix has moved and whose labels are not
// in yet.
func earlyTracker(t *testing.T) *windows.Tracker {
	t.Helper()
	tr, err := windows.NewTracker(windows.TrackerOptions{
		Models: []windows.ModelOptions{{Name: "clinic-triage", ReferenceWindow: "2h-matured", Windows: []windows.Window{
			{Name: "1h", Length: time.Hour},
			{Name: "2h-matured", Length: 2 * time.Hour, Lag: time.Hour},
		}}},
	})
	if err != nil {
		t.Fatal(err)
	}
	classes := []string{"routine", "urgent", "emergency"}
	tr.SetClasses("clinic-triage", classes)
	old, recent := t0.Add(30*time.Minute), t0.Add(150*time.Minute)
	ref := [][]int64{{170, 20, 10}, {15, 70, 15}, {2, 8, 40}}
	var ch store.Changes
	for a, row := range ref {
		for p, n := range row {
			ch.Cells = append(ch.Cells, store.CellDelta{Model: "clinic-triage", Bucket: old, Actual: classes[a], Predicted: classes[p], N: n})
		}
	}
	for p, n := range []int64{187, 98, 65} {
		ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: "clinic-triage", Bucket: old, Predicted: classes[p], N: n})
	}
	for p, n := range []int64{100, 90, 60} {
		ch.Predicted = append(ch.Predicted, store.PredictedDelta{Model: "clinic-triage", Bucket: recent, Predicted: classes[p], N: n})
	}
	for _, b := range []time.Time{old, recent} {
		for k, c := range classes {
			ch.Scores = append(ch.Scores, store.ScoreDelta{Model: "clinic-triage", Bucket: b, Class: c, Bin: 2 + 3*k, N: 50})
			ch.Scores = append(ch.Scores, store.ScoreDelta{Model: "clinic-triage", Bucket: b, Class: c, Bin: 1 + k, N: 50})
		}
	}
	ch.Calibration = []store.CalibrationDelta{
		{Model: "clinic-triage", Bucket: old, Bin: 6, N: 100, ScoreSum: 65, Correct: 60},
		{Model: "clinic-triage", Bucket: old, Bin: 9, N: 250, ScoreSum: 237.5, Correct: 220},
	}
	ch.Brier = []store.BrierDelta{{Model: "clinic-triage", Bucket: old, N: 350, Sum: 70}}
	tr.Apply(ch, map[string]time.Time{"clinic-triage": recent.Add(time.Minute)})
	return tr
}

// TestGathererEarlyWarning checks the early-warning families of a scrape:
// the estimated prevalence of the recent window equals stats.BBSE on the
// reference window's matrix and the window's predicted counts (itself
// checked against numpy.linalg.lstsq in TestBBSEReference), the Brier
// score and calibration error follow from the aggregates by hand, the
// figures needing labels are absent from the unlabeled window, and
// promtool check metrics accepts every family.
func TestGathererEarlyWarning(t *testing.T) {
	tr := earlyTracker(t)
	text := exposition(t, checked(tr))
	series, _ := scrapeSeries(t, text)
	get := func(name, labels string) (float64, bool) {
		v, ok := series[name+"{"+labels+"}"]
		if !ok {
			return 0, false
		}
		f, err := strconv.ParseFloat(v, 64)
		if err != nil {
			t.Fatal(err)
		}
		return f, true
	}
	est, ok, err := stats.BBSE([][]int64{{170, 20, 10}, {15, 70, 15}, {2, 8, 40}}, []int64{100, 90, 60}, 0.95)
	if err != nil || !ok {
		t.Fatal(ok, err)
	}
	for k, c := range []string{"routine", "urgent", "emergency"} {
		labels := `class="` + c + `",model="clinic-triage",window="1h"`
		for _, f := range []struct {
			name string
			want float64
		}{
			{"classwatch_estimated_prevalence_ratio", est.Prevalence[k]},
			{"classwatch_estimated_prevalence_lower_ratio", est.Lo[k]},
			{"classwatch_estimated_prevalence_upper_ratio", est.Hi[k]},
		} {
			if got, ok := get(f.name, labels); !ok || got != f.want {
				t.Errorf("%s{%s} = %v (present %v), want %v", f.name, labels, got, ok, f.want)
			}
		}
		// Same score histograms in both windows: no shift.
		if got, ok := get("classwatch_score_shift_distance", labels); !ok || got != 0 {
			t.Errorf("score shift of %s = %v (present %v), want 0", c, got, ok)
		}
	}
	matured := `model="clinic-triage",window="2h-matured"`
	// Brier 70/350 = 0.2; ECE (|60 − 65| + |220 − 237.5|)/350 = 22.5/350.
	for name, want := range map[string]float64{
		"classwatch_brier_score": 0.2, "classwatch_calibration_error_ratio": 22.5 / 350, "classwatch_window_scored": 350,
	} {
		if got, ok := get(name, matured); !ok || got != want {
			t.Errorf("%s{%s} = %v (present %v), want %v", name, matured, got, ok, want)
		}
		if _, ok := get(name, `model="clinic-triage",window="1h"`); ok != (name == "classwatch_window_scored") {
			t.Errorf("%s of the unlabeled window: present %v", name, ok)
		}
	}
	checkPromtool(t, text)
	if !strings.Contains(string(text), "classwatch_estimated_precision_ratio{") {
		t.Error("no classwatch_estimated_precision_ratio series")
	}
}
