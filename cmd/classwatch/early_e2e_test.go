package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// The early-warning end-to-end test runs "classwatch serve" against each
// store, posts the scored predictions and labels of testdata/early_e2e over
// HTTP, and checks the figures of README.md "Early warning" in /metrics, the
// windows answer and the matrix answer against what testdata/early_e2e/gen.py
// computed with numpy, scipy and scikit-learn.

// earlyDir holds the fixture; gen.py writes all of it.
var earlyDir = filepath.Join("testdata", "early_e2e")

// earlyFixture is testdata/early_e2e/expected.json.
type earlyFixture struct {
	Generator  string            `json:"generator"`
	Versions   map[string]string `json:"versions"`
	Bucket     string            `json:"bucket"`
	Confidence float64           `json:"confidence"`
	Models     []struct {
		Name            string                  `json:"name"`
		Classes         []string                `json:"classes"`
		ReferenceWindow string                  `json:"reference_window"`
		Windows         map[string]earlyFigures `json:"windows"`
		Period          earlyFigures            `json:"period"`
	} `json:"models"`
	Bad ingestResponse `json:"bad"`
}

// earlyFigures are one period's early-warning figures as gen.py writes
// them; nil is undefined.
type earlyFigures struct {
	From             time.Time `json:"from"`
	To               time.Time `json:"to"`
	Length           string    `json:"length"`
	Lag              string    `json:"lag"`
	Predictions      int64     `json:"predictions"`
	Scored           int64     `json:"scored"`
	Brier            *float64  `json:"brier"`
	BrierSklearn     *float64  `json:"brier_sklearn"`
	CalibrationError *float64  `json:"calibration_error"`
	Reliability      []relBin  `json:"reliability"`
	// CalibrationCurve is scikit-learn's answer over the non-empty bins;
	// two classes only.
	CalibrationCurve *struct {
		Accuracy  []float64 `json:"accuracy"`
		MeanScore []float64 `json:"mean_score"`
	} `json:"calibration_curve"`
	PerClass map[string]earlyClass `json:"per_class"`
}

// relBin is one reliability bin, in gen.py and in the read API.
type relBin struct {
	Count     int64    `json:"count"`
	MeanScore *float64 `json:"mean_score"`
	Accuracy  *float64 `json:"accuracy"`
}

// earlyClass is one class's early-warning figures, in gen.py and in the
// read API.
type earlyClass struct {
	EstimatedPrevalence *float64 `json:"estimated_prevalence"`
	ScoreShift          *float64 `json:"score_shift"`
}

// earlyMetrics is the early-warning part of a read-API "metrics" object
// (README.md "HTTP API" and "Early warning").
type earlyMetrics struct {
	Scored           *float64              `json:"scored"`
	Brier            *float64              `json:"brier"`
	CalibrationError *float64              `json:"calibration_error"`
	Reliability      []relBin              `json:"reliability"`
	PerClass         map[string]earlyClass `json:"per_class"`
}

func TestEarlyWarningE2E(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the binary; skipped with -short")
	}
	fx := loadEarlyFixture(t)
	bin := buildBinary(t)
	for _, backend := range e2eBackends {
		t.Run(backend.name, func(t *testing.T) {
			t.Parallel()
			d := startDaemon(t, bin, writeEarlyConfig(t, fx, backend.database(t)))
			runEarlyScenario(t, d, fx)
			d.stop(t)
		})
	}
}

// runEarlyScenario posts the fixture and checks every figure against it.
func runEarlyScenario(t *testing.T, d *runningDaemon, fx earlyFixture) {
	// Early labels first: their predictions are unknown yet, so they wait.
	for _, post := range []struct{ path, file string }{
		{"/v1/labels", "labels_early.ndjson"},
		{"/v1/predictions", "predictions.ndjson"},
		{"/v1/labels", "labels.ndjson"},
	} {
		got := postNDJSON(t, d.url+post.path, filepath.Join(earlyDir, post.file))
		if len(got.Rejected) != 0 || got.Accepted == 0 {
			t.Fatalf("POST %s: accepted %d, rejected %+v; want all accepted", post.file, got.Accepted, got.Rejected)
		}
	}
	checkBadScores(t, d.url, fx.Bad)

	e := parseExposition(t, scrape(t, d.url+"/metrics"))
	for _, m := range fx.Models {
		var ws struct {
			Windows []struct {
				Name    string       `json:"name"`
				Metrics earlyMetrics `json:"metrics"`
			} `json:"windows"`
		}
		getJSON(t, d.url+"/v1/models/"+url.PathEscape(m.Name)+"/windows", http.StatusOK, &ws)
		if len(ws.Windows) != len(m.Windows) {
			t.Errorf("%s: %d windows, want %d", m.Name, len(ws.Windows), len(m.Windows))
		}
		for _, w := range ws.Windows {
			want, ok := m.Windows[w.Name]
			if !ok {
				t.Errorf("%s: unexpected window %q", m.Name, w.Name)
				continue
			}
			where := m.Name + " window " + w.Name
			checkEarlySeries(t, e, m.Name, w.Name, m.Classes, want)
			compareEarly(t, "GET windows "+where, m.Classes, w.Metrics, want)
		}

		var rep struct {
			Predictions int64        `json:"predictions"`
			Metrics     earlyMetrics `json:"metrics"`
		}
		p := m.Period
		q := url.Values{"from": {p.From.Format(time.RFC3339)}, "to": {p.To.Format(time.RFC3339)}}
		getJSON(t, d.url+"/v1/models/"+url.PathEscape(m.Name)+"/matrix?"+q.Encode(), http.StatusOK, &rep)
		if rep.Predictions != p.Predictions {
			t.Errorf("%s GET matrix: %d predictions, want %d", m.Name, rep.Predictions, p.Predictions)
		}
		compareEarly(t, m.Name+" GET matrix "+periodName(p.From, p.To, nil, nil), m.Classes, rep.Metrics, p)
	}
	checkUnscoredCountsNowhere(t, d.url, fx)
}

// checkEarlySeries compares the early-warning series of README.md
// "Prometheus metrics" for one window with the fixture.
func checkEarlySeries(tb testing.TB, e exposition, model, window string, classes []string, want earlyFigures) {
	tb.Helper()
	win := map[string]string{"model": model, "window": window}
	e.checkSeries(tb, "classwatch_window_scored", win, asFloat(want.Scored))
	// source: numpy multi-class Brier score via testdata/early_e2e/gen.py
	e.checkSeries(tb, "classwatch_brier_score", win, want.Brier)
	// source: numpy expected calibration error over 10 equal-width bins via testdata/early_e2e/gen.py
	e.checkSeries(tb, "classwatch_calibration_error_ratio", win, want.CalibrationError)
	for _, c := range classes {
		labels := map[string]string{"model": model, "window": window, "class": c}
		// source: numpy.linalg.lstsq, clipped and renormalised, via testdata/early_e2e/gen.py
		e.checkSeriesClose(tb, "classwatch_estimated_prevalence_ratio", labels, want.PerClass[c].EstimatedPrevalence, earlyClose)
		// source: scipy.spatial.distance.jensenshannon via testdata/early_e2e/gen.py
		e.checkSeriesClose(tb, "classwatch_score_shift_distance", labels, want.PerClass[c].ScoreShift, earlyClose)
	}
}

// compareEarly compares a read-API metrics object with the fixture.
func compareEarly(tb testing.TB, where string, classes []string, got earlyMetrics, want earlyFigures) {
	tb.Helper()
	if got.Scored == nil || *got.Scored != float64(want.Scored) {
		tb.Errorf("%s: scored %v, want %d", where, deref(got.Scored), want.Scored)
	}
	// source: numpy multi-class Brier score via testdata/early_e2e/gen.py
	compareEarlyValue(tb, where+": brier", got.Brier, want.Brier)
	if want.BrierSklearn != nil {
		// source: scikit-learn 1.2.1 brier_score_loss of each class's
		// score, summed via testdata/early_e2e/gen.py; twice one class's
		// when the two scores sum to 1 (README.md "Early warning"), which
		// rounded and top-only scores do not
		compareEarlyValue(tb, where+": brier vs Σ brier_score_loss", got.Brier, want.BrierSklearn)
	}
	// source: numpy over the same 10 bins via testdata/early_e2e/gen.py
	compareEarlyValue(tb, where+": calibration_error", got.CalibrationError, want.CalibrationError)
	if len(got.Reliability) != len(want.Reliability) {
		tb.Errorf("%s: %d reliability bins, want %d", where, len(got.Reliability), len(want.Reliability))
	} else {
		for b, w := range want.Reliability {
			g := got.Reliability[b]
			if g.Count != w.Count {
				tb.Errorf("%s: reliability bin %d count %d, want %d", where, b, g.Count, w.Count)
			}
			compareEarlyValue(tb, fmt.Sprintf("%s: reliability bin %d mean_score", where, b), g.MeanScore, w.MeanScore)
			compareEarlyValue(tb, fmt.Sprintf("%s: reliability bin %d accuracy", where, b), g.Accuracy, w.Accuracy)
		}
	}
	if cc := want.CalibrationCurve; cc != nil {
		// source: scikit-learn 1.2.1 sklearn.calibration.calibration_curve(
		// strategy="uniform", n_bins=10) on the predicted class's score and
		// its correctness; it lists the non-empty bins only
		var acc, mean []float64
		for _, b := range got.Reliability {
			if b.Count > 0 && b.Accuracy != nil && b.MeanScore != nil {
				acc, mean = append(acc, *b.Accuracy), append(mean, *b.MeanScore)
			}
		}
		compareSlices(tb, where+": calibration_curve prob_true", acc, cc.Accuracy)
		compareSlices(tb, where+": calibration_curve prob_pred", mean, cc.MeanScore)
	}
	for _, c := range classes {
		g, w := got.PerClass[c], want.PerClass[c]
		// source: numpy.linalg.lstsq on the reference's matrix and the
		// window's shares, clipped and renormalised, via testdata/early_e2e/gen.py
		compareEarlyValue(tb, where+": "+c+" estimated_prevalence", g.EstimatedPrevalence, w.EstimatedPrevalence)
		// source: scipy.spatial.distance.jensenshannon via testdata/early_e2e/gen.py
		compareEarlyValue(tb, where+": "+c+" score_shift", g.ScoreShift, w.ScoreShift)
	}
}

func compareSlices(tb testing.TB, what string, got, want []float64) {
	tb.Helper()
	if len(got) != len(want) {
		tb.Errorf("%s: %d non-empty bins %v, want %d %v", what, len(got), got, len(want), want)
		return
	}
	for i := range want {
		compareEarlyValue(tb, fmt.Sprintf("%s[%d]", what, i), &got[i], &want[i])
	}
}

func compareEarlyValue(tb testing.TB, what string, got, want *float64) {
	tb.Helper()
	compareValueWith(tb, what, got, want, earlyClose)
}

// earlyClose reports whether got is within relTol of want, or within
// 1e-12 of it: both sides compute a figure that may be exactly 0 (a
// clipped prevalence, the distance of a histogram to itself) by different
// float64 routes (gonum's SVD against LAPACK's, say).
func earlyClose(got, want float64) bool {
	return nearlyEqual(got, want) || math.Abs(got-want) <= 1e-12
}

// checkBadScores posts the fixture's bad lines and expects each rejected
// with its line number and exact message (README.md "Early warning"); a
// batch whose every line is rejected answers 400 (README.md "HTTP API").
func checkBadScores(tb testing.TB, base string, want ingestResponse) {
	tb.Helper()
	body, err := os.ReadFile(filepath.Join(earlyDir, "bad.ndjson"))
	if err != nil {
		tb.Fatal(err)
	}
	got := postBody(tb, base+"/v1/predictions", body, http.StatusBadRequest)
	if got.Accepted != want.Accepted {
		tb.Errorf("POST bad.ndjson: accepted %d, want %d", got.Accepted, want.Accepted)
	}
	if fmt.Sprint(got.Rejected) != fmt.Sprint(want.Rejected) {
		tb.Errorf("POST bad.ndjson: rejected\n%+v\nwant\n%+v", got.Rejected, want.Rejected)
	}
}

// checkUnscoredCountsNowhere posts, into each model's latest window, one
// prediction without scores and its label: the window gains a prediction
// and a labeled one, and every score figure stays as it was.
func checkUnscoredCountsNowhere(tb testing.TB, base string, fx earlyFixture) {
	tb.Helper()
	m := fx.Models[0]
	const window = "1h"
	w := m.Windows[window]
	at := w.To.Add(-10 * time.Minute).Format(time.RFC3339)
	id := "unscored-1"
	for _, p := range []struct{ path, line string }{
		{"/v1/predictions", fmt.Sprintf(`{"model":%q,"id":%q,"at":%q,"predicted":%q}`, m.Name, id, at, m.Classes[0])},
		{"/v1/labels", fmt.Sprintf(`{"model":%q,"id":%q,"at":%q,"actual":%q}`, m.Name, id, at, m.Classes[1])},
	} {
		got := postBody(tb, base+p.path, []byte(p.line+"\n"), http.StatusOK)
		if got.Accepted != 1 || len(got.Rejected) != 0 {
			tb.Fatalf("POST %s: %+v, want one line accepted", p.line, got)
		}
	}
	e := parseExposition(tb, scrape(tb, base+"/metrics"))
	labels := map[string]string{"model": m.Name, "window": window}
	e.checkSeries(tb, "classwatch_window_predictions", labels, asFloat(w.Predictions+1))
	e.checkSeries(tb, "classwatch_window_scored", labels, asFloat(w.Scored))
	e.checkSeries(tb, "classwatch_brier_score", labels, w.Brier)
	e.checkSeries(tb, "classwatch_calibration_error_ratio", labels, w.CalibrationError)
}

func loadEarlyFixture(tb testing.TB) earlyFixture {
	tb.Helper()
	data, err := os.ReadFile(filepath.Join(earlyDir, "expected.json"))
	if err != nil {
		tb.Fatal(err)
	}
	var fx earlyFixture
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&fx); err != nil {
		tb.Fatalf("decode expected.json: %v", err)
	}
	if len(fx.Models) == 0 || len(fx.Bad.Rejected) == 0 {
		tb.Fatalf("expected.json has no models or bad lines; rerun %s", fx.Generator)
	}
	return fx
}

// writeEarlyConfig writes the daemon's config: the fixture's models, each
// with its reference_window, the windows (the same for every model), the
// event clock and no limit on event times.
func writeEarlyConfig(tb testing.TB, fx earlyFixture, database string) string {
	tb.Helper()
	dir := tb.TempDir()
	var b strings.Builder
	fmt.Fprintf(&b, "data_dir: %q\ndatabase: %q\n", filepath.Join(dir, "data"), database)
	fmt.Fprintf(&b, "bucket: %s\nconfidence: %v\nclock: event\nwindows:\n", fx.Bucket, fx.Confidence)
	for _, name := range sortedKeys(fx.Models[0].Windows) {
		w := fx.Models[0].Windows[name]
		fmt.Fprintf(&b, "  - {name: %q, length: %s, lag: %s}\n", name, w.Length, w.Lag)
	}
	b.WriteString("models:\n")
	for _, m := range fx.Models {
		fmt.Fprintf(&b, "  - name: %q\n    classes: [%s]\n    reference_window: %q\n",
			m.Name, strings.Join(m.Classes, ", "), m.ReferenceWindow)
	}
	b.WriteString("ingest: {max_future: 0}\n")
	path := filepath.Join(dir, "classwatch.yml")
	if err := os.WriteFile(path, []byte(b.String()), 0o600); err != nil {
		tb.Fatal(err)
	}
	return path
}
