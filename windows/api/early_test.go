package api_test

import (
	"fmt"
	"net/http"
	"net/url"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/stats"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// TestMatrixEarlyWarning checks that the matrix answer of a recent,
// unlabeled period carries the estimated prevalence against the model's
// reference window (README.md "Early warning"), equal to stats.BBSE on the
// reference window's labeled matrix and the period's predicted counts, and
// that the windows answer carries it too, with reliability bins.
func TestMatrixEarlyWarning(t *testing.T) {
	s := sqlitestoretest.Open(t, sqlitestore.Options{})
	tr, err := windows.NewTracker(windows.TrackerOptions{
		Store: s,
		Models: []windows.ModelOptions{{Name: "card-screen", ReferenceWindow: "30m-matured", Windows: []windows.Window{
			{Name: "1h", Length: time.Hour},
			{Name: "30m-matured", Length: 30 * time.Minute, Lag: 30 * time.Minute},
		}}},
	})
	if err != nil {
		t.Fatal(err)
	}
	b := serve(t, s, tr)

	preds, labels := earlyTraffic()
	b.predict(t, "card-screen", cardClasses, preds...)
	b.label(t, "card-screen", labels...)

	ref, ok := tr.View("card-screen", "30m-matured")
	if !ok || ref.Matrix.Total() != 40 {
		t.Fatalf("reference window holds %d labeled predictions, want 40", ref.Matrix.Total())
	}
	// Rows actual (legit, fraud), columns predicted.
	want, ok, err := stats.BBSE(ref.Matrix.Dense(), []int64{15, 15}, 0.95)
	if err != nil || !ok {
		t.Fatal(ok, err)
	}
	var body struct {
		Metrics struct {
			PerClass map[string]struct {
				Estimate *float64    `json:"estimated_prevalence"`
				Interval *[2]float64 `json:"estimated_prevalence_interval"`
			} `json:"per_class"`
		} `json:"metrics"`
	}
	status, raw := b.get(t, matrixPath("card-screen", url.Values{"from": {rfc(at(40))}, "to": {rfc(at(70))}}), &body)
	if status != http.StatusOK {
		t.Fatalf("status %d: %s", status, raw)
	}
	for k, c := range cardClasses {
		got := body.Metrics.PerClass[c]
		if got.Estimate == nil || *got.Estimate != want.Prevalence[k] || got.Interval == nil || got.Interval[0] != want.Lo[k] || got.Interval[1] != want.Hi[k] {
			t.Errorf("%s: estimated prevalence %v %v, want %g [%g, %g]", c, got.Estimate, got.Interval, want.Prevalence[k], want.Lo[k], want.Hi[k])
		}
	}

	var ws struct {
		Windows []struct {
			Name    string `json:"name"`
			Metrics struct {
				Reliability []windows.ReliabilityBin `json:"reliability"`
				PerClass    map[string]struct {
					Estimate *float64 `json:"estimated_prevalence"`
				} `json:"per_class"`
			} `json:"metrics"`
		} `json:"windows"`
	}
	if status, raw := b.get(t, "/v1/models/card-screen/windows", &ws); status != http.StatusOK {
		t.Fatalf("status %d: %s", status, raw)
	}
	for _, w := range ws.Windows {
		if len(w.Metrics.Reliability) != store.ScoreBins || w.Metrics.PerClass["fraud"].Estimate == nil {
			t.Errorf("window %s: %d reliability bins, fraud estimate %v", w.Name, len(w.Metrics.Reliability), w.Metrics.PerClass["fraud"].Estimate)
		}
	}
}

// earlyTraffic is TestMatrixEarlyWarning's traffic. Minutes 10–39 (the
// reference window once the watermark is 13:10): 40 labeled predictions;
// minutes 40–69: 30 unlabeled ones, more of them fraud.
func earlyTraffic() (preds []store.Prediction, labels []store.Label) {
	for i := range 40 {
		actual, predicted := "legit", "legit"
		switch {
		case i < 12:
			actual, predicted = "fraud", "fraud"
		case i < 15:
			actual = "fraud"
		case i < 19:
			predicted = "fraud"
		}
		id := fmt.Sprintf("ref-%02d", i)
		preds = append(preds, store.Prediction{ID: id, At: at(10 + i*29/40), Predicted: predicted})
		labels = append(labels, store.Label{ID: id, Actual: actual, At: at(300)})
	}
	for i := range 30 {
		predicted := "legit"
		if i%2 == 0 {
			predicted = "fraud"
		}
		preds = append(preds, store.Prediction{ID: fmt.Sprintf("new-%02d", i), At: at(40 + i), Predicted: predicted})
	}
	return preds, labels
}
