package main

import (
	"bytes"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"strings"
	"testing"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
)

// The end-to-end tests' reading of /metrics: scrape, parse, compare.

// scrape fetches a /metrics exposition as text.
func scrape(tb testing.TB, target string) string {
	tb.Helper()
	resp, err := http.Get(target)
	if err != nil {
		tb.Fatalf("scrape: %v", err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		tb.Fatalf("scrape: read body: %v", err)
	}
	if resp.StatusCode != http.StatusOK {
		tb.Fatalf("scrape: status %d\n%s", resp.StatusCode, body)
	}
	return string(body)
}

// exposition indexes a scrape's samples by family and labels.
type exposition map[string]map[string]float64

// labelKey renders a label set in name order, e.g. `class="wet",model="m"`.
func labelKey(labels map[string]string) string {
	parts := make([]string, 0, len(labels))
	for _, n := range sortedKeys(labels) {
		parts = append(parts, fmt.Sprintf("%s=%q", n, labels[n]))
	}
	return strings.Join(parts, ",")
}

func parseExposition(tb testing.TB, text string) exposition {
	tb.Helper()
	parser := expfmt.NewTextParser(model.LegacyValidation)
	families, err := parser.TextToMetricFamilies(strings.NewReader(text))
	if err != nil {
		tb.Fatalf("parse /metrics: %v", err)
	}
	out := exposition{}
	for name, mf := range families {
		out[name] = map[string]float64{}
		for _, m := range mf.GetMetric() {
			labels := map[string]string{}
			for _, lp := range m.GetLabel() {
				labels[lp.GetName()] = lp.GetValue()
			}
			out[name][labelKey(labels)] = sampleValue(mf.GetType(), m)
		}
	}
	return out
}

func sampleValue(t dto.MetricType, m *dto.Metric) float64 {
	switch t {
	case dto.MetricType_COUNTER:
		return m.GetCounter().GetValue()
	case dto.MetricType_GAUGE:
		return m.GetGauge().GetValue()
	default:
		return m.GetUntyped().GetValue()
	}
}

// checkSeries expects family{labels} to exist with value want, or to be
// absent when want is nil (an undefined ratio, README.md "Metric definitions").
func (e exposition) checkSeries(tb testing.TB, family string, labels map[string]string, want *float64) {
	tb.Helper()
	e.checkSeriesClose(tb, family, labels, want, nearlyEqual)
}

// checkSeriesClose is checkSeries with the closeness test passed in.
func (e exposition) checkSeriesClose(tb testing.TB, family string, labels map[string]string, want *float64, near func(got, want float64) bool) {
	tb.Helper()
	got, ok := e[family][labelKey(labels)]
	switch {
	case want == nil && ok:
		tb.Errorf("%s{%s} = %v, want the series absent (undefined)", family, labelKey(labels), got)
	case want != nil && !ok:
		tb.Errorf("%s{%s} is missing, want %v", family, labelKey(labels), *want)
	case want != nil && !near(got, *want):
		tb.Errorf("%s{%s} = %v, want %v", family, labelKey(labels), got, *want)
	}
}

// countSeries counts a family's series for one model.
func (e exposition) countSeries(family, modelName string) int {
	n := 0
	for key := range e[family] {
		if strings.Contains(key, fmt.Sprintf("model=%q", modelName)) {
			n++
		}
	}
	return n
}

// classSeries lists the {model,window,class} families of README.md "Prometheus metrics" (plus
// our per-class prediction count) with the figure each carries.
var classSeries = []struct {
	family string
	value  func(c classFigures) *float64
}{
	{"classwatch_recall_ratio", func(c classFigures) *float64 { return c.Recall }},
	{"classwatch_precision_ratio", func(c classFigures) *float64 { return c.Precision }},
	{"classwatch_specificity_ratio", func(c classFigures) *float64 { return c.Specificity }},
	{"classwatch_f1_ratio", func(c classFigures) *float64 { return c.F1 }},
	{"classwatch_prevalence_ratio", func(c classFigures) *float64 { return c.Prevalence }},
	{"classwatch_predicted_ratio", func(c classFigures) *float64 { return c.PredictedShare }},
	{"classwatch_recall_lower_ratio", func(c classFigures) *float64 { return bound(c.RecallInterval, 0) }},
	{"classwatch_recall_upper_ratio", func(c classFigures) *float64 { return bound(c.RecallInterval, 1) }},
	{"classwatch_window_class_predictions", func(c classFigures) *float64 { return asFloat(c.Predictions) }},
}

// windowSeries lists the {model,window} families of README.md "Prometheus metrics".
var windowSeries = []struct {
	family string
	value  func(f figures) *float64
}{
	{"classwatch_balanced_accuracy_ratio", func(f figures) *float64 { return f.BalancedAccuracy }},
	{"classwatch_accuracy_ratio", func(f figures) *float64 { return f.Accuracy }},
	{"classwatch_macro_f1_ratio", func(f figures) *float64 { return f.MacroF1 }},
	{"classwatch_label_coverage_ratio", func(f figures) *float64 { return f.LabelCoverage }},
	{"classwatch_window_predictions", func(f figures) *float64 { return asFloat(f.Predictions) }},
	{"classwatch_window_labeled", func(f figures) *float64 { return asFloat(f.Labeled) }},
}

func bound(iv *[2]float64, i int) *float64 {
	if iv == nil {
		return nil
	}
	return &iv[i]
}

// asFloat returns a count as a figure.
func asFloat(n int64) *float64 {
	v := float64(n)
	return &v
}

// checkWindowSeries compares every per-window series of README.md "Prometheus metrics" with the
// fixture, and the ingest counters with the outcomes gen.py simulated.
func checkWindowSeries(tb testing.TB, e exposition, fx e2eFixture) {
	tb.Helper()
	// present counts the series each family should have.
	present := map[string]int{}
	for _, s := range windowSeries {
		present[s.family] = 0
	}
	for _, s := range classSeries {
		present[s.family] = 0
	}
	for _, name := range sortedKeys(fx.Windows) {
		w := fx.Windows[name]
		win := map[string]string{"model": fx.Model, "window": name}

		// source: window bounds of README.md "Join semantics and windows", computed by testdata/e2e/gen.py
		e.checkSeries(tb, "classwatch_window_start_timestamp_seconds", win, asFloat(w.From.Unix()))
		e.checkSeries(tb, "classwatch_window_end_timestamp_seconds", win, asFloat(w.To.Unix()))

		// source: scikit-learn 1.2.1 confusion_matrix, accuracy_score,
		// balanced_accuracy_score, f1_score(average='macro') via
		// testdata/e2e/gen.py
		for a, actual := range fx.Classes {
			for p, predicted := range fx.Classes {
				cell := map[string]string{"model": fx.Model, "window": name, "actual": actual, "predicted": predicted}
				e.checkSeries(tb, "classwatch_confusion", cell, asFloat(w.Matrix[a][p]))
			}
		}
		for _, s := range windowSeries {
			want := s.value(w.figures)
			e.checkSeries(tb, s.family, win, want)
			if want != nil {
				present[s.family]++
			}
		}

		// source: scikit-learn 1.2.1 precision_recall_fscore_support and
		// statsmodels 0.13.5 proportion_confint(method='wilson') via
		// testdata/e2e/gen.py
		for _, class := range fx.Classes {
			labels := map[string]string{"model": fx.Model, "window": name, "class": class}
			for _, s := range classSeries {
				want := s.value(w.PerClass[class])
				e.checkSeries(tb, s.family, labels, want)
				if want != nil {
					present[s.family]++
				}
			}
		}
	}

	// No stray series: only the windows configured, each series once.
	n := len(fx.Classes)
	present["classwatch_confusion"] = len(fx.Windows) * n * n
	for family, want := range present {
		if got := e.countSeries(family, fx.Model); got != want {
			tb.Errorf("%s has %d series for model %s, want %d", family, got, fx.Model, want)
		}
	}

	// source: testdata/e2e/gen.py (watermark of README.md "Join semantics and windows")
	e.checkSeries(tb, "classwatch_watermark_timestamp_seconds", map[string]string{"model": fx.Model}, asFloat(fx.Watermark.Unix()))

	// source: the outcomes of the join semantics of windows/store/store.go,
	// simulated by testdata/e2e/gen.py
	e.checkSeries(tb, "classwatch_predictions_received_total", map[string]string{"model": fx.Model}, &fx.PredictionsReceived)
	for _, result := range sortedKeys(fx.LabelResults) {
		want := fx.LabelResults[result]
		e.checkSeries(tb, "classwatch_labels_received_total", map[string]string{"model": fx.Model, "result": result}, &want)
	}
	if _, ok := e["classwatch_labels_received_total"][labelKey(map[string]string{"model": fx.Model, "result": "rejected"})]; !ok {
		tb.Errorf("classwatch_labels_received_total{model=%q,result=\"rejected\"} is missing", fx.Model)
	}
}

// checkPromtool lints the scrape with "promtool check metrics".
func checkPromtool(tb testing.TB, text string) {
	tb.Helper()
	promtool, err := exec.LookPath("promtool")
	if err != nil {
		promtool = "/usr/bin/promtool"
		if _, err := os.Stat(promtool); err != nil {
			if os.Getenv("CI") == "true" {
				tb.Fatalf("promtool not found; CI must check the scrape")
			}
			tb.Log("promtool not found: the scrape is not linted")
			return
		}
	}
	cmd := exec.Command(promtool, "check", "metrics")
	cmd.Stdin = strings.NewReader(text)
	out, err := cmd.CombinedOutput()
	if err != nil || len(bytes.TrimSpace(out)) > 0 {
		tb.Errorf("promtool check metrics: %v\n%s", err, out)
	}
}
