package api_test

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"maps"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api"
)

// tableReport is a report on a small three-class matrix with one class
// never labeled, so that some figures are undefined.
func tableReport(t *testing.T) api.Report {
	t.Helper()
	m := windows.NewMatrix([]string{"intact", "damaged", "wet"})
	m.Add(0, 0, 40)
	m.Add(0, 1, 3)
	m.Add(1, 1, 5)
	m.Add(1, 0, 2)
	return api.Report{
		Model: "parcel-sorter", From: t0, To: t0.Add(time.Hour), AsOf: t0.Add(2 * time.Hour),
		Figures: api.NewFigures(m, []int64{45, 9, 1}, 0.95),
	}
}

// TestFiguresJSONContract pins the JSON field names of the metrics object
// (README.md "HTTP API"): adding a metric to windows.MetricDefs adds its
// name here, and nothing else may change them.
func TestFiguresJSONContract(t *testing.T) {
	rep := tableReport(t)
	body, err := json.Marshal(rep.Metrics)
	if err != nil {
		t.Fatal(err)
	}
	var top map[string]json.RawMessage
	if err := json.Unmarshal(body, &top); err != nil {
		t.Fatal(err)
	}
	wantTop := []string{"accuracy", "balanced_accuracy", "brier", "calibration_error", "kappa", "label_coverage", "macro_f1", "mcc", "per_class", "scored"}
	if got := slices.Sorted(maps.Keys(top)); !slices.Equal(got, wantTop) {
		t.Errorf("metrics fields %v, want %v", got, wantTop)
	}
	var perClass map[string]map[string]json.RawMessage
	if err := json.Unmarshal(top["per_class"], &perClass); err != nil {
		t.Fatal(err)
	}
	wantClass := []string{"estimated_precision", "estimated_prevalence", "estimated_prevalence_interval", "f1",
		"precision", "precision_interval", "predicted_share", "predictions", "prevalence",
		"recall", "recall_interval", "score_shift", "specificity", "specificity_interval", "support"}
	for _, c := range rep.Classes {
		if got := slices.Sorted(maps.Keys(perClass[c])); !slices.Equal(got, wantClass) {
			t.Errorf("per_class.%s fields %v, want %v", c, got, wantClass)
		}
	}
	// "wet" is never labeled nor predicted correctly: recall undefined.
	if got := string(perClass["wet"]["recall"]); got != "null" {
		t.Errorf("per_class.wet.recall = %s, want null", got)
	}
	if got := string(perClass["intact"]["support"]); got != "43" {
		t.Errorf("per_class.intact.support = %s, want 43", got)
	}

	// A decoded report encodes to the same bytes.
	var back api.MetricFigures
	if err := json.Unmarshal(body, &back); err != nil {
		t.Fatal(err)
	}
	again, err := json.Marshal(back)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(again, body) {
		t.Errorf("round trip changed the JSON:\n%s\nwant\n%s", again, body)
	}
}

// TestReportFormatsFollowTable checks that the audit table and CSV show
// every metric of windows.MetricDefs, by title and by name, with interval
// bounds for those that have one.
func TestReportFormatsFollowTable(t *testing.T) {
	rep := tableReport(t)
	var tab, c bytes.Buffer
	if err := api.WriteReport(&tab, rep, api.FormatTable); err != nil {
		t.Fatal(err)
	}
	if err := api.WriteReport(&c, rep, api.FormatCSV); err != nil {
		t.Fatal(err)
	}
	rows, err := csv.NewReader(&c).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	metrics := make(map[string]bool)
	for _, r := range rows[1:] {
		metrics[r[8]] = true
	}
	for _, d := range windows.MetricDefs() {
		if !strings.Contains(tab.String(), d.Title) {
			t.Errorf("table lacks %q", d.Title)
		}
		want := []string{d.Name}
		if d.Interval != nil {
			want = append(want, d.Name+"_lower", d.Name+"_upper")
		}
		for _, name := range want {
			if !metrics[name] {
				t.Errorf("csv has no %s rows", name)
			}
		}
	}
}
