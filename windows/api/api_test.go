package api_test

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"net/url"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/api"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// t0 is the start of the scenario: a fictional bank's card screening
// model, "card-screen", with classes legit and fraud, 5-minute buckets.
var t0 = time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)

type testBundle struct {
	store   *sqlitestore.Store
	tracker *windows.Tracker
	server  *httptest.Server
}

// setup serves the API on a new store with the default windows 1h and
// 30m-matured.
func setup(t *testing.T) *testBundle {
	t.Helper()
	s := sqlitestoretest.Open(t, sqlitestore.Options{})
	tr, err := windows.NewTracker(windows.TrackerOptions{
		Store:         s,
		DefaultBucket: 5 * time.Minute,
		DefaultWindows: []windows.Window{
			{Name: "1h", Length: time.Hour},
			{Name: "30m-matured", Length: 30 * time.Minute, Lag: 30 * time.Minute},
		},
	})
	if err != nil {
		t.Fatal(err)
	}
	return serve(t, s, tr)
}

// serve serves the API on s and tr, the clock at t0 + 5h, until the test
// ends.
func serve(t *testing.T, s *sqlitestore.Store, tr *windows.Tracker) *testBundle {
	t.Helper()
	mux := http.NewServeMux()
	api.New(api.Options{Store: s, Tracker: tr, Now: func() time.Time { return t0.Add(5 * time.Hour) }}).Register(mux)
	srv := httptest.NewServer(mux)
	t.Cleanup(srv.Close)
	return &testBundle{store: s, tracker: tr, server: srv}
}

func (b *testBundle) predict(t *testing.T, model string, classes []string, preds ...store.Prediction) {
	t.Helper()
	ctx := context.Background()
	cls, err := b.store.EnsureModel(ctx, model, classes, 0)
	if err != nil {
		t.Fatal(err)
	}
	b.tracker.SetClasses(model, cls)
	var latest time.Time
	for i := range preds {
		preds[i].Model = model
		preds[i].Bucket = windows.BucketStart(preds[i].At, 5*time.Minute)
		if preds[i].At.After(latest) {
			latest = preds[i].At
		}
	}
	res, err := b.store.IngestPredictions(ctx, preds, latest)
	if err != nil {
		t.Fatal(err)
	}
	b.tracker.Apply(res.Changes, map[string]time.Time{model: latest})
}

func (b *testBundle) label(t *testing.T, model string, labels ...store.Label) {
	t.Helper()
	for i := range labels {
		labels[i].Model = model
	}
	res, err := b.store.IngestLabels(context.Background(), labels, t0)
	if err != nil {
		t.Fatal(err)
	}
	b.tracker.Apply(res.Changes, nil)
}

// get fetches path and decodes the JSON body into v (when not nil).
func (b *testBundle) get(t *testing.T, path string, v any) (int, []byte) {
	t.Helper()
	resp, err := http.Get(b.server.URL + path)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	if v != nil {
		if err := json.Unmarshal(body, v); err != nil {
			t.Fatalf("GET %s: %v\n%s", path, err, body)
		}
	}
	return resp.StatusCode, body
}

func matrixPath(model string, params url.Values) string {
	return "/v1/models/" + url.PathEscape(model) + "/matrix?" + params.Encode()
}

func at(minutes int) time.Time { return t0.Add(time.Duration(minutes) * time.Minute) }

func rfc(t time.Time) string { return t.Format(time.RFC3339) }

var cardClasses = []string{"legit", "fraud"}

func TestMatrixRejectsBadQueries(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses, store.Prediction{ID: "txn-1", At: at(1), Predicted: "legit"})
	for _, tc := range []struct {
		name   string
		params url.Values
		want   []string // fragments of the error message
	}{
		{"from misaligned", url.Values{"from": {"2026-03-01T12:03:00Z"}, "to": {rfc(at(60))}},
			[]string{"from 2026-03-01T12:03:00Z is not aligned", "5m buckets", "2026-03-01T12:00:00Z or 2026-03-01T12:05:00Z"}},
		{"to misaligned", url.Values{"from": {rfc(t0)}, "to": {"2026-03-01T13:00:30Z"}},
			[]string{"to 2026-03-01T13:00:30Z is not aligned"}},
		{"to before from", url.Values{"from": {rfc(at(60))}, "to": {rfc(t0)}}, []string{"must be after from"}},
		{"empty period", url.Values{"from": {rfc(t0)}, "to": {rfc(t0)}}, []string{"must be after from"}},
		{"from missing", url.Values{"to": {rfc(t0)}}, []string{"from is required"}},
		{"not RFC 3339", url.Values{"from": {"yesterday"}, "to": {rfc(t0)}}, []string{`from "yesterday" is not an RFC 3339 time`}},
		{"as_of malformed", url.Values{"from": {rfc(t0)}, "to": {rfc(at(60))}, "as_of": {"1700000000"}}, []string{"as_of"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var body struct{ Error string }
			status, raw := b.get(t, matrixPath("card-screen", tc.params), &body)
			if status != http.StatusBadRequest {
				t.Fatalf("status %d, want 400: %s", status, raw)
			}
			for _, frag := range tc.want {
				if !strings.Contains(body.Error, frag) {
					t.Errorf("error %q does not say %q", body.Error, frag)
				}
			}
		})
	}
}

func TestUnknownModel(t *testing.T) {
	b := setup(t)
	for _, path := range []string{
		matrixPath("no-such-model", url.Values{"from": {rfc(t0)}, "to": {rfc(at(60))}}),
		"/v1/models/no-such-model/windows",
	} {
		var body struct{ Error string }
		status, raw := b.get(t, path, &body)
		if status != http.StatusNotFound || !strings.Contains(body.Error, `unknown model "no-such-model"`) {
			t.Errorf("GET %s: %d %s, want 404 naming the model", path, status, raw)
		}
	}
}

// TestMatrixContract checks every key of the design's response contract
// and the figures of a small matrix worked out by hand.
func TestMatrixContract(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses,
		store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud"},
		store.Prediction{ID: "txn-2", At: at(2), Predicted: "fraud"},
		store.Prediction{ID: "txn-3", At: at(3), Predicted: "legit"},
		store.Prediction{ID: "txn-4", At: at(7), Predicted: "legit"},
		store.Prediction{ID: "txn-5", At: at(8), Predicted: "legit"},
	)
	b.label(t, "card-screen",
		store.Label{ID: "txn-1", Actual: "fraud", At: at(30)},
		store.Label{ID: "txn-2", Actual: "legit", At: at(30)},
		store.Label{ID: "txn-3", Actual: "fraud", At: at(30)},
		store.Label{ID: "txn-4", Actual: "legit", At: at(30)},
	)
	var body map[string]any
	status, raw := b.get(t, matrixPath("card-screen", url.Values{"from": {rfc(t0)}, "to": {rfc(at(10))}}), &body)
	if status != http.StatusOK {
		t.Fatalf("status %d: %s", status, raw)
	}
	for _, k := range []string{"model", "from", "to", "as_of", "classes", "matrix", "predictions", "labeled", "metrics"} {
		if _, ok := body[k]; !ok {
			t.Errorf("response lacks %q", k)
		}
	}
	metrics := body["metrics"].(map[string]any)
	for _, k := range []string{"accuracy", "balanced_accuracy", "macro_f1", "label_coverage", "per_class", "mcc", "kappa"} {
		if _, ok := metrics[k]; !ok {
			t.Errorf("metrics lack %q", k)
		}
	}
	fraud := metrics["per_class"].(map[string]any)["fraud"].(map[string]any)
	for _, k := range []string{"support", "recall", "precision", "specificity", "f1", "prevalence", "predicted_share", "recall_interval", "precision_interval"} {
		if _, ok := fraud[k]; !ok {
			t.Errorf("per_class.fraud lacks %q", k)
		}
	}

	var rep api.Report
	if err := json.Unmarshal(raw, &rep); err != nil {
		t.Fatal(err)
	}
	if got, want := body["from"], "2026-03-01T12:00:00Z"; got != want {
		t.Errorf("from = %v, want %v", got, want)
	}
	if got, want := body["as_of"], "2026-03-01T17:00:00Z"; got != want {
		t.Errorf("as_of without as_of = %v, want the read time %v", got, want)
	}
	if got, want := rep.Classes, cardClasses; !slices.Equal(got, want) {
		t.Errorf("classes = %v, want %v", got, want)
	}
	// Rows actual (legit, fraud), columns predicted: txn-4 legit→legit,
	// txn-2 legit→fraud, txn-3 fraud→legit, txn-1 fraud→fraud; txn-5 has no
	// label yet.
	if got, want := rep.Matrix, [][]int64{{1, 1}, {1, 1}}; !slices.EqualFunc(got, want, slices.Equal) {
		t.Errorf("matrix = %v, want %v", got, want)
	}
	if rep.Predictions != 5 || rep.Labeled != 4 {
		t.Errorf("predictions, labeled = %d, %d, want 5, 4", rep.Predictions, rep.Labeled)
	}
	// Hand-worked: fraud recall = TP/(TP+FN) = 1/2, precision = 1/2,
	// predicted share = 2 fraud predictions of 5, coverage = 4/5.
	f := rep.Metrics.PerClass["fraud"]
	for _, c := range []struct {
		name      string
		got       *float64
		want      float64
		wantExact bool
	}{
		{"fraud recall", f.Values["recall"], 0.5, true},
		{"fraud precision", f.Values["precision"], 0.5, true},
		{"fraud predicted share", f.Values["predicted_share"], 0.4, true},
		{"label coverage", rep.Metrics.Values["label_coverage"], 0.8, true},
	} {
		if c.got == nil || *c.got != c.want {
			t.Errorf("%s = %v, want %v", c.name, c.got, c.want)
		}
	}
	// Wilson interval for 1 of 2 at 95% (statsmodels 0.13
	// proportion_confint(1, 2, method="wilson") = (0.0945, 0.9055)).
	if iv := f.Intervals["recall"]; iv == nil || abs(iv[0]-0.0945) > 1e-4 || abs(iv[1]-0.9055) > 1e-4 {
		t.Errorf("fraud recall interval = %v, want about [0.0945, 0.9055]", iv)
	}
}

func abs(x float64) float64 { return max(x, -x) }

// TestMatrixNullForUndefined checks that figures with a zero denominator
// are JSON null, never 0.
func TestMatrixNullForUndefined(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses, store.Prediction{ID: "txn-1", At: at(1), Predicted: "legit"})
	var body struct {
		Metrics struct {
			Accuracy         json.RawMessage                       `json:"accuracy"`
			BalancedAccuracy json.RawMessage                       `json:"balanced_accuracy"`
			MacroF1          json.RawMessage                       `json:"macro_f1"`
			LabelCoverage    json.RawMessage                       `json:"label_coverage"`
			PerClass         map[string]map[string]json.RawMessage `json:"per_class"`
		}
	}
	status, raw := b.get(t, matrixPath("card-screen", url.Values{"from": {rfc(t0)}, "to": {rfc(at(5))}}), &body)
	if status != http.StatusOK {
		t.Fatalf("status %d: %s", status, raw)
	}
	// One unlabeled prediction: coverage 0/1 = 0 is defined; nothing else.
	if got, want := string(body.Metrics.LabelCoverage), "0"; got != want {
		t.Errorf("label_coverage = %s, want %s", got, want)
	}
	for name, v := range map[string]json.RawMessage{"accuracy": body.Metrics.Accuracy, "balanced_accuracy": body.Metrics.BalancedAccuracy, "macro_f1": body.Metrics.MacroF1} {
		if string(v) != "null" {
			t.Errorf("%s = %s, want null", name, v)
		}
	}
	for _, k := range []string{"recall", "precision", "specificity", "f1", "prevalence", "recall_interval", "precision_interval"} {
		if got := string(body.Metrics.PerClass["fraud"][k]); got != "null" {
			t.Errorf("per_class.fraud.%s = %s, want null", k, got)
		}
	}
	if got, want := string(body.Metrics.PerClass["legit"]["predicted_share"]), "1"; got != want {
		t.Errorf("per_class.legit.predicted_share = %s, want %s", got, want)
	}
}

// TestMatrixAsOf corrects a label and checks that the period's matrix as
// of a time before the correction still shows the first label.
func TestMatrixAsOf(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses, store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud"})
	b.label(t, "card-screen", store.Label{ID: "txn-1", Actual: "legit", At: at(20)})
	b.label(t, "card-screen", store.Label{ID: "txn-1", Actual: "fraud", At: at(90)}) // the correction
	period := url.Values{"from": {rfc(t0)}, "to": {rfc(at(5))}}

	var now, before, first api.Report
	b.get(t, matrixPath("card-screen", period), &now)
	period.Set("as_of", rfc(at(60)))
	b.get(t, matrixPath("card-screen", period), &before)
	period.Set("as_of", rfc(at(10)))
	b.get(t, matrixPath("card-screen", period), &first)

	// Rows actual (legit, fraud), columns predicted (legit, fraud).
	if got, want := now.Matrix, [][]int64{{0, 0}, {0, 1}}; !slices.EqualFunc(got, want, slices.Equal) {
		t.Errorf("matrix now = %v, want %v", got, want)
	}
	if got, want := before.Matrix, [][]int64{{0, 1}, {0, 0}}; !slices.EqualFunc(got, want, slices.Equal) {
		t.Errorf("matrix as of 13:00 = %v, want %v", got, want)
	}
	if !before.AsOf.Equal(at(60)) {
		t.Errorf("as_of = %s, want %s", before.AsOf, at(60))
	}
	if got, want := first.Labeled, int64(0); got != want {
		t.Errorf("labeled as of 12:10 = %d, want %d (no label known yet)", got, want)
	}
	if got, want := first.Predictions, int64(1); got != want {
		t.Errorf("predictions as of 12:10 = %d, want %d", got, want)
	}
}

func TestMatrixSegment(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses,
		store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud", Segment: "web"},
		store.Prediction{ID: "txn-2", At: at(2), Predicted: "legit", Segment: "branch"},
		store.Prediction{ID: "txn-3", At: at(3), Predicted: "legit", Segment: "web"},
	)
	b.label(t, "card-screen",
		store.Label{ID: "txn-1", Actual: "fraud", At: at(30)},
		store.Label{ID: "txn-2", Actual: "fraud", At: at(30)},
	)
	var web, branch, all api.Report
	period := url.Values{"from": {rfc(t0)}, "to": {rfc(at(5))}}
	b.get(t, matrixPath("card-screen", period), &all)
	period.Set("segment", "web")
	b.get(t, matrixPath("card-screen", period), &web)
	period.Set("segment", "branch")
	b.get(t, matrixPath("card-screen", period), &branch)
	for _, c := range []struct {
		name                 string
		rep                  api.Report
		predictions, labeled int64
		matrix               [][]int64
	}{
		{"all", all, 3, 2, [][]int64{{0, 0}, {1, 1}}},
		{"web", web, 2, 1, [][]int64{{0, 0}, {0, 1}}},
		{"branch", branch, 1, 1, [][]int64{{0, 0}, {1, 0}}},
	} {
		if c.rep.Predictions != c.predictions || c.rep.Labeled != c.labeled || !slices.EqualFunc(c.rep.Matrix, c.matrix, slices.Equal) {
			t.Errorf("%s: %d predictions, %d labeled, %v; want %d, %d, %v", c.name, c.rep.Predictions, c.rep.Labeled, c.rep.Matrix, c.predictions, c.labeled, c.matrix)
		}
	}
	if web.Segment == nil || *web.Segment != "web" || all.Segment != nil {
		t.Errorf("segment echoed as %v and %v", web.Segment, all.Segment)
	}
}

func TestWindowsAndModels(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses,
		store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud"},
		store.Prediction{ID: "txn-2", At: at(44), Predicted: "legit"},
		store.Prediction{ID: "txn-3", At: at(58), Predicted: "legit"},
	)
	b.label(t, "card-screen", store.Label{ID: "txn-1", Actual: "fraud", At: at(70)}, store.Label{ID: "txn-3", Actual: "fraud", At: at(70)})

	var wins api.ModelWindows
	if status, raw := b.get(t, "/v1/models/card-screen/windows", &wins); status != http.StatusOK {
		t.Fatalf("status %d: %s", status, raw)
	}
	// Latest prediction 12:58 → watermark 13:00; 1h covers [12:00, 13:00),
	// 30m-matured [12:00, 12:30).
	if wins.Watermark == nil || !wins.Watermark.Equal(at(60)) {
		t.Fatalf("watermark = %v, want %s", wins.Watermark, at(60))
	}
	if len(wins.Windows) != 2 {
		t.Fatalf("%d windows, want 2", len(wins.Windows))
	}
	for _, c := range []struct {
		name        string
		from, to    time.Time
		predictions int64
		matrix      [][]int64
	}{
		{"1h", at(0), at(60), 3, [][]int64{{0, 0}, {1, 1}}},
		{"30m-matured", at(0), at(30), 1, [][]int64{{0, 0}, {0, 1}}},
	} {
		i := slices.IndexFunc(wins.Windows, func(w api.WindowReport) bool { return w.Name == c.name })
		if i < 0 {
			t.Errorf("window %s missing", c.name)
			continue
		}
		w := wins.Windows[i]
		if w.From == nil || !w.From.Equal(c.from) || !w.To.Equal(c.to) {
			t.Errorf("%s bounds [%v, %v), want [%s, %s)", c.name, w.From, w.To, c.from, c.to)
		}
		if w.Predictions != c.predictions || !slices.EqualFunc(w.Matrix, c.matrix, slices.Equal) {
			t.Errorf("%s: %d predictions %v, want %d %v", c.name, w.Predictions, w.Matrix, c.predictions, c.matrix)
		}
	}

	var models struct{ Models []api.ModelSummary }
	if status, raw := b.get(t, "/v1/models", &models); status != http.StatusOK {
		t.Fatalf("status %d: %s", status, raw)
	}
	if len(models.Models) != 1 {
		t.Fatalf("%d models, want 1", len(models.Models))
	}
	m := models.Models[0]
	if m.Name != "card-screen" || !slices.Equal(m.Classes, cardClasses) || m.Predictions != 3 || m.Labeled != 2 {
		t.Errorf("model %+v", m)
	}
	if m.Watermark == nil || !m.Watermark.Equal(at(60)) || len(m.Windows) != 2 || m.Bucket != "5m" {
		t.Errorf("model watermark %v, windows %v, bucket %s", m.Watermark, m.Windows, m.Bucket)
	}
}

func TestHealthAndReadiness(t *testing.T) {
	b := setup(t)
	if status, raw := b.get(t, "/healthz", nil); status != http.StatusOK {
		t.Errorf("healthz %d: %s", status, raw)
	}
	if status, raw := b.get(t, "/readyz", nil); status != http.StatusOK {
		t.Errorf("readyz %d: %s", status, raw)
	}
	b.store.Close()
	if status, raw := b.get(t, "/readyz", nil); status != http.StatusServiceUnavailable {
		t.Errorf("readyz with the store closed: %d %s, want 503", status, raw)
	}
	if status, _ := b.get(t, "/healthz", nil); status != http.StatusOK {
		t.Errorf("healthz with the store closed: %d, want 200", status)
	}
	if status, raw := b.get(t, "/", nil); status != http.StatusOK || !strings.Contains(string(raw), "did not answer the model list") {
		t.Errorf("overview with the store closed: %d, want 200 and a notice:\n%s", status, raw)
	}
	if status, raw := b.get(t, "/v1/models", nil); status != http.StatusServiceUnavailable {
		t.Errorf("models with the store closed: %d %s, want 503", status, raw)
	}
}

func TestWriteReport(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses,
		store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud"},
		store.Prediction{ID: "txn-2", At: at(2), Predicted: "legit"},
	)
	b.label(t, "card-screen", store.Label{ID: "txn-1", Actual: "fraud", At: at(30)})
	rep, err := api.MatrixReport(context.Background(), b.store,
		api.MatrixQuery{Model: "card-screen", From: t0, To: at(5), Bucket: 5 * time.Minute}, at(300), 0.95)
	if err != nil {
		t.Fatal(err)
	}

	var js bytes.Buffer
	if err := api.WriteReport(&js, rep, "json"); err != nil {
		t.Fatal(err)
	}
	var back api.Report
	if err := json.Unmarshal(js.Bytes(), &back); err != nil {
		t.Fatal(err)
	}
	if !slices.EqualFunc(back.Matrix, rep.Matrix, slices.Equal) || back.Model != rep.Model {
		t.Errorf("json round trip: %+v, want %+v", back, rep)
	}

	var tab bytes.Buffer
	if err := api.WriteReport(&tab, rep, "table"); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"card-screen", "balanced accuracy", "confusion matrix", "95% CI", "fraud"} {
		if !strings.Contains(tab.String(), want) {
			t.Errorf("table lacks %q:\n%s", want, tab.String())
		}
	}

	var c bytes.Buffer
	if err := api.WriteReport(&c, rep, "csv"); err != nil {
		t.Fatal(err)
	}
	rows, err := csv.NewReader(&c).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	// Header, 12 summary rows, 2×2 cells, 19 figures per class.
	if got, want := len(rows), 1+12+4+2*19; got != want {
		t.Errorf("%d csv rows, want %d", got, want)
	}
	var recallLegit, cellFraud []string
	for _, r := range rows {
		if r[5] == "class" && r[6] == "legit" && r[8] == "recall" {
			recallLegit = r
		}
		if r[5] == "matrix" && r[6] == "fraud" && r[7] == "fraud" {
			cellFraud = r
		}
	}
	if recallLegit == nil || recallLegit[9] != "" {
		t.Errorf("legit recall row %v: want an empty value (no legit example)", recallLegit)
	}
	if cellFraud == nil || cellFraud[9] != "1" {
		t.Errorf("fraud/fraud cell row %v, want 1", cellFraud)
	}
	if err := api.WriteReport(io.Discard, rep, "xml"); err == nil {
		t.Error("format xml: no error")
	}
}
