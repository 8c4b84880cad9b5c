package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"math"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// The end-to-end test builds the real binary, runs "classwatch serve" as a
// child process against each store, pushes the fixture of testdata/e2e over
// HTTP, and checks /metrics, the read API, "classwatch audit" and
// "classwatch verify" against figures that testdata/e2e/gen.py computed
// independently with scikit-learn and statsmodels.

// TestMain lets pgtest stop the throwaway PostgreSQL cluster it may start.
func TestMain(m *testing.M) { pgtest.Main(m) }

// e2eDir holds the fixture; gen.py writes all of it.
var e2eDir = filepath.Join("testdata", "e2e")

// relTol is the relative tolerance of figure comparisons: both sides are
// float64 results of the same formulas evaluated in a different order.
const relTol = 1e-9

// e2eFixture is testdata/e2e/expected.json.
type e2eFixture struct {
	Generator  string            `json:"generator"`
	Versions   map[string]string `json:"versions"`
	Model      string            `json:"model"`
	Classes    []string          `json:"classes"`
	Confidence float64           `json:"confidence"`
	Bucket     string            `json:"bucket"`
	Watermark  time.Time         `json:"watermark"`
	Ingest     struct {
		Predictions ingestSummary `json:"predictions"`
		LabelsEarly ingestSummary `json:"labels_early"`
		Labels      ingestSummary `json:"labels"`
	} `json:"ingest"`
	PredictionsReceived float64            `json:"predictions_received"`
	LabelResults        map[string]float64 `json:"label_results"`
	Windows             map[string]struct {
		figures
		From   time.Time `json:"from"`
		To     time.Time `json:"to"`
		Length string    `json:"length"`
		Lag    string    `json:"lag"`
	} `json:"windows"`
	Periods []struct {
		figures
		From    time.Time  `json:"from"`
		To      time.Time  `json:"to"`
		Segment *string    `json:"segment"`
		AsOf    *time.Time `json:"as_of"`
	} `json:"periods"`
}

// ingestSummary is what one POST must answer.
type ingestSummary struct {
	Accepted      int   `json:"accepted"`
	Duplicates    int   `json:"duplicates"`
	RejectedLines []int `json:"rejected_lines"`
}

// figures are a matrix and its metrics in the shape gen.py writes them;
// nil is undefined.
type figures struct {
	Matrix           [][]int64               `json:"matrix"`
	Predictions      int64                   `json:"predictions"`
	Labeled          int64                   `json:"labeled"`
	Accuracy         *float64                `json:"accuracy"`
	BalancedAccuracy *float64                `json:"balanced_accuracy"`
	MacroF1          *float64                `json:"macro_f1"`
	LabelCoverage    *float64                `json:"label_coverage"`
	MCC              *float64                `json:"mcc"`
	Kappa            *float64                `json:"kappa"`
	PerClass         map[string]classFigures `json:"per_class"`
}

// classFigures are one class's figures, with the JSON keys of both gen.py
// and the read API.
type classFigures struct {
	Support             int64       `json:"support"`
	Predictions         int64       `json:"predictions"`
	Recall              *float64    `json:"recall"`
	Precision           *float64    `json:"precision"`
	Specificity         *float64    `json:"specificity"`
	F1                  *float64    `json:"f1"`
	Prevalence          *float64    `json:"prevalence"`
	PredictedShare      *float64    `json:"predicted_share"`
	RecallInterval      *[2]float64 `json:"recall_interval"`
	PrecisionInterval   *[2]float64 `json:"precision_interval"`
	SpecificityInterval *[2]float64 `json:"specificity_interval"`
}

// apiFigures is the figures part of a read-API body (README.md "HTTP API"): the
// overall metrics sit under "metrics".
type apiFigures struct {
	Classes     []string  `json:"classes"`
	Matrix      [][]int64 `json:"matrix"`
	Predictions int64     `json:"predictions"`
	Labeled     int64     `json:"labeled"`
	Metrics     struct {
		Accuracy         *float64                `json:"accuracy"`
		BalancedAccuracy *float64                `json:"balanced_accuracy"`
		MacroF1          *float64                `json:"macro_f1"`
		LabelCoverage    *float64                `json:"label_coverage"`
		MCC              *float64                `json:"mcc"`
		Kappa            *float64                `json:"kappa"`
		PerClass         map[string]classFigures `json:"per_class"`
	} `json:"metrics"`
}

func (a apiFigures) figures() figures {
	m := a.Metrics
	return figures{
		Matrix: a.Matrix, Predictions: a.Predictions, Labeled: a.Labeled,
		Accuracy: m.Accuracy, BalancedAccuracy: m.BalancedAccuracy, MacroF1: m.MacroF1,
		LabelCoverage: m.LabelCoverage, MCC: m.MCC, Kappa: m.Kappa, PerClass: m.PerClass,
	}
}

// matrixReport is the body of GET /v1/models/{model}/matrix and the output
// of "classwatch audit --format json".
type matrixReport struct {
	apiFigures
	Model   string    `json:"model"`
	From    time.Time `json:"from"`
	To      time.Time `json:"to"`
	AsOf    time.Time `json:"as_of"`
	Segment *string   `json:"segment"`
}

// ingestResponse is the body of POST /v1/predictions and /v1/labels.
type ingestResponse struct {
	Accepted   int `json:"accepted"`
	Duplicates int `json:"duplicates"`
	Rejected   []struct {
		Line  int    `json:"line"`
		Error string `json:"error"`
	} `json:"rejected"`
	Error string `json:"error"`
}

// e2eBackends are the stores the end-to-end tests run against: database
// returns the config's database key, "" for SQLite.
var e2eBackends = []struct {
	name     string
	database func(tb testing.TB) string
}{
	{"sqlite", func(testing.TB) string { return "" }},
	{"postgres", pgtest.URL},
}

func TestE2E(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the binary; skipped with -short")
	}
	fx := loadE2EFixture(t)
	bin := buildBinary(t)

	for _, backend := range e2eBackends {
		t.Run(backend.name, func(t *testing.T) {
			t.Parallel()
			cfg := writeE2EConfig(t, fx, backend.database(t))
			runE2EScenario(t, bin, cfg, fx)
		})
	}
}

// runE2EScenario is the whole scenario against one store: ingest over
// HTTP, the scrape, the read API, a graceful stop, then verify and audit.
func runE2EScenario(t *testing.T, bin, cfg string, fx e2eFixture) {
	d := startDaemon(t, bin, cfg)

	// Labels first: their predictions are unknown yet, so they wait.
	for _, post := range []struct {
		path, file string
		want       ingestSummary
	}{
		{"/v1/labels", "labels_early.ndjson", fx.Ingest.LabelsEarly},
		{"/v1/predictions", "predictions.ndjson", fx.Ingest.Predictions},
		{"/v1/labels", "labels.ndjson", fx.Ingest.Labels},
	} {
		checkIngest(t, d.url+post.path, filepath.Join(e2eDir, post.file), post.want)
	}

	text := scrape(t, d.url+"/metrics")
	checkWindowSeries(t, parseExposition(t, text), fx)
	checkPromtool(t, text)

	checkWindowsAPI(t, d.url, fx)
	for _, p := range fx.Periods {
		where := periodName(p.From, p.To, p.Segment, p.AsOf)
		got := getMatrix(t, d.url, fx.Model, p.From, p.To, p.Segment, p.AsOf)
		checkReport(t, "GET matrix "+where, got, fx, p.From, p.To, p.Segment, p.AsOf)
		// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
		compareFigures(t, "GET matrix "+where, fx.Classes, got.figures(), p.figures)
	}
	checkMisaligned(t, d.url, fx)

	d.stop(t)

	out := runCommand(t, bin, "verify", "--config", cfg)
	if want := "verify: every count matches the raw rows"; !strings.Contains(out, want) {
		t.Errorf("classwatch verify printed %q, want a line %q", out, want)
	}
	for _, p := range fx.Periods {
		where := periodName(p.From, p.To, p.Segment, p.AsOf)
		args := []string{"audit", "--config", cfg, "--model", fx.Model, "--format", "json",
			"--from", p.From.Format(time.RFC3339), "--to", p.To.Format(time.RFC3339)}
		if p.Segment != nil {
			args = append(args, "--segment", *p.Segment)
		}
		if p.AsOf != nil {
			args = append(args, "--as-of", p.AsOf.Format(time.RFC3339))
		}
		var got matrixReport
		if err := json.Unmarshal([]byte(runCommand(t, bin, args...)), &got); err != nil {
			t.Fatalf("classwatch audit %s: decode output: %v", where, err)
		}
		checkReport(t, "audit "+where, got, fx, p.From, p.To, p.Segment, p.AsOf)
		// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
		compareFigures(t, "audit "+where, fx.Classes, got.figures(), p.figures)
	}
}

func loadE2EFixture(tb testing.TB) e2eFixture {
	tb.Helper()
	data, err := os.ReadFile(filepath.Join(e2eDir, "expected.json"))
	if err != nil {
		tb.Fatal(err)
	}
	var fx e2eFixture
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&fx); err != nil {
		tb.Fatalf("decode expected.json: %v", err)
	}
	if len(fx.Windows) == 0 || len(fx.Periods) == 0 || len(fx.Classes) == 0 {
		tb.Fatalf("expected.json has no windows, periods or classes; rerun %s", fx.Generator)
	}
	return fx
}

// postNDJSON posts an NDJSON file, expects 200 and returns the answer.
func postNDJSON(tb testing.TB, target, file string) ingestResponse {
	tb.Helper()
	body, err := os.ReadFile(file)
	if err != nil {
		tb.Fatal(err)
	}
	return postBody(tb, target, body, http.StatusOK)
}

// postBody posts an NDJSON body, expects wantStatus and returns the
// decoded answer.
func postBody(tb testing.TB, target string, body []byte, wantStatus int) ingestResponse {
	tb.Helper()
	resp, err := http.Post(target, "application/x-ndjson", bytes.NewReader(body))
	if err != nil {
		tb.Fatalf("POST %s: %v", target, err)
	}
	defer resp.Body.Close()
	var got ingestResponse
	if err := json.NewDecoder(resp.Body).Decode(&got); err != nil {
		tb.Fatalf("POST %s: decode answer: %v", target, err)
	}
	if resp.StatusCode != wantStatus {
		tb.Fatalf("POST %s: status %d (%s), want %d", target, resp.StatusCode, got.Error, wantStatus)
	}
	return got
}

// checkIngest posts an NDJSON file and checks the answer's counts and the
// rejected line numbers.
func checkIngest(tb testing.TB, target, file string, want ingestSummary) {
	tb.Helper()
	body, err := os.ReadFile(file)
	if err != nil {
		tb.Fatal(err)
	}
	got := postBody(tb, target, body, http.StatusOK)

	lines := 0
	for _, l := range strings.Split(string(body), "\n") {
		if strings.TrimSpace(l) != "" {
			lines++
		}
	}
	if n := got.Accepted + got.Duplicates + len(got.Rejected); n != lines {
		tb.Errorf("POST %s: accepted %d + duplicates %d + rejected %d = %d, want the %d lines sent",
			file, got.Accepted, got.Duplicates, len(got.Rejected), n, lines)
	}
	// source: the join semantics of windows/store/store.go, simulated by
	// testdata/e2e/gen.py
	if got.Accepted != want.Accepted || got.Duplicates != want.Duplicates {
		tb.Errorf("POST %s: accepted %d, duplicates %d; want %d, %d", file, got.Accepted, got.Duplicates, want.Accepted, want.Duplicates)
	}
	rejected := make([]int, len(got.Rejected))
	for i, r := range got.Rejected {
		rejected[i] = r.Line
		if r.Error == "" {
			tb.Errorf("POST %s: line %d rejected without an error message", file, r.Line)
		}
	}
	if !slices.Equal(rejected, want.RejectedLines) {
		tb.Errorf("POST %s: rejected lines %v, want %v", file, rejected, want.RejectedLines)
	}
}

// checkWindowsAPI compares GET /v1/models/{model}/windows with the fixture.
func checkWindowsAPI(tb testing.TB, base string, fx e2eFixture) {
	tb.Helper()
	var got struct {
		Model     string    `json:"model"`
		Watermark time.Time `json:"watermark"`
		Windows   []struct {
			apiFigures
			Name string    `json:"name"`
			From time.Time `json:"from"`
			To   time.Time `json:"to"`
		} `json:"windows"`
	}
	getJSON(tb, base+"/v1/models/"+url.PathEscape(fx.Model)+"/windows", http.StatusOK, &got)
	if !got.Watermark.Equal(fx.Watermark) {
		tb.Errorf("GET windows: watermark %v, want %v", got.Watermark, fx.Watermark)
	}
	var names []string
	for _, w := range got.Windows {
		names = append(names, w.Name)
		want, ok := fx.Windows[w.Name]
		if !ok {
			continue
		}
		if !w.From.Equal(want.From) || !w.To.Equal(want.To) {
			tb.Errorf("GET windows %s: [%v, %v), want [%v, %v)", w.Name, w.From, w.To, want.From, want.To)
		}
		if !slices.Equal(w.Classes, fx.Classes) {
			tb.Errorf("GET windows %s: classes %v, want %v", w.Name, w.Classes, fx.Classes)
		}
		// source: scikit-learn 1.2.1 / statsmodels 0.13.5 via testdata/e2e/gen.py
		compareFigures(tb, "GET windows "+w.Name, fx.Classes, w.figures(), want.figures)
	}
	if slices.Sort(names); !slices.Equal(names, sortedKeys(fx.Windows)) {
		tb.Errorf("GET windows: windows %v, want %v", names, sortedKeys(fx.Windows))
	}
}

func getMatrix(tb testing.TB, base, modelName string, from, to time.Time, segment *string, asOf *time.Time) matrixReport {
	tb.Helper()
	q := url.Values{"from": {from.Format(time.RFC3339)}, "to": {to.Format(time.RFC3339)}}
	if segment != nil {
		q.Set("segment", *segment)
	}
	if asOf != nil {
		q.Set("as_of", asOf.Format(time.RFC3339))
	}
	var rep matrixReport
	getJSON(tb, base+"/v1/models/"+url.PathEscape(modelName)+"/matrix?"+q.Encode(), http.StatusOK, &rep)
	return rep
}

// checkMisaligned expects 400 for a period that does not start on a
// bucket boundary, with a message saying so.
func checkMisaligned(tb testing.TB, base string, fx e2eFixture) {
	tb.Helper()
	p := fx.Periods[0]
	q := url.Values{
		"from": {p.From.Add(2 * time.Minute).Format(time.RFC3339)},
		"to":   {p.To.Format(time.RFC3339)},
	}
	var got struct {
		Error string `json:"error"`
	}
	getJSON(tb, base+"/v1/models/"+url.PathEscape(fx.Model)+"/matrix?"+q.Encode(), http.StatusBadRequest, &got)
	if !strings.Contains(got.Error, "aligned") {
		tb.Errorf("GET matrix with a misaligned from: error %q, want it to say the period is not aligned", got.Error)
	}
}

func getJSON(tb testing.TB, target string, wantStatus int, v any) {
	tb.Helper()
	resp, err := http.Get(target)
	if err != nil {
		tb.Fatalf("GET %s: %v", target, err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		tb.Fatalf("GET %s: read body: %v", target, err)
	}
	if resp.StatusCode != wantStatus {
		tb.Fatalf("GET %s: status %d, want %d\n%s", target, resp.StatusCode, wantStatus, body)
	}
	if err := json.Unmarshal(body, v); err != nil {
		tb.Fatalf("GET %s: decode: %v\n%s", target, err, body)
	}
}

// checkReport checks a period report's echo of its query and its classes.
func checkReport(tb testing.TB, where string, got matrixReport, fx e2eFixture, from, to time.Time, segment *string, asOf *time.Time) {
	tb.Helper()
	if got.Model != fx.Model || !got.From.Equal(from) || !got.To.Equal(to) {
		tb.Errorf("%s: model %q [%v, %v), want %q [%v, %v)", where, got.Model, got.From, got.To, fx.Model, from, to)
	}
	if (got.Segment == nil) != (segment == nil) || (segment != nil && *got.Segment != *segment) {
		tb.Errorf("%s: segment %v, want %v", where, deref(got.Segment), deref(segment))
	}
	if asOf != nil && !got.AsOf.Equal(*asOf) {
		tb.Errorf("%s: as_of %v, want %v", where, got.AsOf, *asOf)
	}
	if !slices.Equal(got.Classes, fx.Classes) {
		tb.Errorf("%s: classes %v, want %v", where, got.Classes, fx.Classes)
	}
}

// compareFigures compares every count and figure; a nil figure must be nil
// on both sides.
func compareFigures(tb testing.TB, where string, classes []string, got, want figures) {
	tb.Helper()
	if !slices.EqualFunc(got.Matrix, want.Matrix, slices.Equal) {
		tb.Errorf("%s: matrix %v, want %v", where, got.Matrix, want.Matrix)
	}
	if got.Predictions != want.Predictions || got.Labeled != want.Labeled {
		tb.Errorf("%s: predictions %d, labeled %d; want %d, %d", where, got.Predictions, got.Labeled, want.Predictions, want.Labeled)
	}
	for _, f := range []struct {
		name      string
		got, want *float64
	}{
		{"accuracy", got.Accuracy, want.Accuracy},
		{"balanced_accuracy", got.BalancedAccuracy, want.BalancedAccuracy},
		{"macro_f1", got.MacroF1, want.MacroF1},
		{"label_coverage", got.LabelCoverage, want.LabelCoverage},
		{"mcc", got.MCC, want.MCC},
		{"kappa", got.Kappa, want.Kappa},
	} {
		compareValue(tb, where+": "+f.name, f.got, f.want)
	}
	if len(got.PerClass) != len(classes) {
		tb.Errorf("%s: per_class has %d classes, want %d", where, len(got.PerClass), len(classes))
	}
	for _, class := range classes {
		g, w := got.PerClass[class], want.PerClass[class]
		at := where + ": " + class + " "
		if g.Support != w.Support || g.Predictions != w.Predictions {
			tb.Errorf("%ssupport %d, predictions %d; want %d, %d", at, g.Support, g.Predictions, w.Support, w.Predictions)
		}
		for _, f := range []struct {
			name      string
			got, want *float64
		}{
			{"recall", g.Recall, w.Recall},
			{"precision", g.Precision, w.Precision},
			{"specificity", g.Specificity, w.Specificity},
			{"f1", g.F1, w.F1},
			{"prevalence", g.Prevalence, w.Prevalence},
			{"predicted_share", g.PredictedShare, w.PredictedShare},
			{"recall_interval lower", bound(g.RecallInterval, 0), bound(w.RecallInterval, 0)},
			{"recall_interval upper", bound(g.RecallInterval, 1), bound(w.RecallInterval, 1)},
			{"precision_interval lower", bound(g.PrecisionInterval, 0), bound(w.PrecisionInterval, 0)},
			{"precision_interval upper", bound(g.PrecisionInterval, 1), bound(w.PrecisionInterval, 1)},
			{"specificity_interval lower", bound(g.SpecificityInterval, 0), bound(w.SpecificityInterval, 0)},
			{"specificity_interval upper", bound(g.SpecificityInterval, 1), bound(w.SpecificityInterval, 1)},
		} {
			compareValue(tb, at+f.name, f.got, f.want)
		}
	}
}

func compareValue(tb testing.TB, what string, got, want *float64) {
	tb.Helper()
	compareValueWith(tb, what, got, want, nearlyEqual)
}

// compareValueWith reports an optional figure that differs from want: one
// side undefined (nil) and the other not, or both defined and not close.
func compareValueWith(tb testing.TB, what string, got, want *float64, close func(got, want float64) bool) {
	tb.Helper()
	switch {
	case got == nil && want == nil:
	case got == nil || want == nil:
		tb.Errorf("%s = %v, want %v", what, deref(got), deref(want))
	case !close(*got, *want):
		tb.Errorf("%s = %v, want %v", what, *got, *want)
	}
}

// nearlyEqual reports whether got is within relTol of want. Exact zeros
// match only zeros.
func nearlyEqual(got, want float64) bool {
	return math.Abs(got-want) <= relTol*math.Max(math.Abs(got), math.Abs(want))
}

// deref prints an optional value: its value, or "null".
func deref[T any](p *T) any {
	if p == nil {
		return "null"
	}
	return *p
}

func periodName(from, to time.Time, segment *string, asOf *time.Time) string {
	s := fmt.Sprintf("[%s, %s)", from.Format(time.RFC3339), to.Format(time.RFC3339))
	if segment != nil {
		s += " segment=" + *segment
	}
	if asOf != nil {
		s += " as_of=" + asOf.Format(time.RFC3339)
	}
	return s
}

func sortedKeys[V any](m map[string]V) []string {
	return slices.Sorted(maps.Keys(m))
}
