package api_test

import (
	"encoding/json"
	"net/http"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// saveAlert stores an alert record in the JSON form GET /v1/alerts shows
// (README "HTTP API"), as the evaluator does.
func (b *testBundle) saveAlert(t *testing.T, rule, model, class, state string, since time.Time, value float64, iv [2]float64, history bool) {
	t.Helper()
	data, err := json.Marshal(map[string]any{
		"key": rule + "/" + model + "/" + class, "rule": rule, "kind": "floor", "model": model, "class": class,
		"window": "1h", "metric": "recall", "severity": "page", "state": state,
		"active_at": since, "starts_at": since, "evaluated_at": since.Add(time.Minute),
		"result": map[string]any{"outcome": "met", "value": value, "count": 40, "interval": iv, "threshold": 0.7,
			"from": t0, "to": at(60), "reference": map[string]any{"from": at(-120), "to": at(-60), "value": 0.9, "count": 50}},
	})
	if err != nil {
		t.Fatal(err)
	}
	rec := store.AlertRecord{Key: rule + "/" + model + "/" + class, Rule: rule, Model: model, Class: class, State: state, Data: data, UpdatedAt: since}
	if err := b.store.SaveAlert(t.Context(), rec, history); err != nil {
		t.Fatal(err)
	}
}

func (b *testBundle) page(t *testing.T, path string) (int, string) {
	t.Helper()
	resp, err := http.Get(b.server.URL + path)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	status, body := b.get(t, path, nil)
	if ct := resp.Header.Get("Content-Type"); !strings.HasPrefix(ct, "text/html") {
		t.Errorf("GET %s: Content-Type %q, want text/html", path, ct)
	}
	return status, string(body)
}

// selfContained fails when page would fetch anything or run a script
// other than the audit report's data block.
func selfContained(t *testing.T, page string) {
	t.Helper()
	for _, external := range []string{"http://", "https://", "src=", "@import", "url("} {
		if strings.Contains(page, external) {
			t.Errorf("page has %q: it must be self-contained", external)
		}
	}
	if n := strings.Count(page, "<script"); n != strings.Count(page, `<script type="application/json"`) {
		t.Errorf("page has a script that is not a data block")
	}
}

func TestOverviewPage(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses,
		store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud"},
		store.Prediction{ID: "txn-2", At: at(2), Predicted: "legit"},
		store.Prediction{ID: "txn-3", At: at(3), Predicted: "legit"})
	b.label(t, "card-screen",
		store.Label{ID: "txn-1", Actual: "fraud", At: at(3)},
		store.Label{ID: "txn-2", Actual: "fraud", At: at(4)},
		store.Label{ID: "txn-3", Actual: "legit", At: at(5)})
	b.predict(t, "<b>desk</b>", []string{"billing", "outage"}, store.Prediction{ID: "t-1", At: at(2), Predicted: "outage"})
	b.saveAlert(t, "fraud-recall-floor", "card-screen", "fraud", "firing", at(10), 0.5, [2]float64{0.09, 0.91}, false)
	b.saveAlert(t, "desk-slow", "<b>desk</b>", "outage", "pending", at(20), 0.2, [2]float64{0.1, 0.3}, false)
	b.saveAlert(t, "old-one", "card-screen", "legit", "inactive", at(20), 0.9, [2]float64{0.8, 0.95}, false)

	status, page := b.page(t, "/")
	if status != http.StatusOK {
		t.Fatalf("GET /: %d", status)
	}
	for _, want := range []string{
		`href="/models/card-screen"`, "30m-matured", "matured, lag 30m", "watermark", "all time: 3 predictions, 3 labeled",
		"not a validation of the model",
		// now is t0+5h; the last prediction was at 12:03, the last label at 12:05.
		"last prediction <span class=\"stale\" title=\"older than the shortest window\">4h57m ago</span>",
		"last label <span class=\"stale\" title=\"older than the longest window\">4h55m ago</span>",
		// Worst class first: fraud recall 1/2 before legit 1/1.
		"fraud <b>0.500</b>",
		"&lt;b&gt;desk&lt;/b&gt;", // names are escaped
		"1 firing", "1 pending", "since 2026-03-01T12:10:00Z",
	} {
		if !strings.Contains(page, want) {
			t.Errorf("page lacks %q", want)
		}
	}
	if testing.Verbose() {
		t.Log(page)
	}
	if strings.Contains(page, "old-one") {
		t.Error("page lists an inactive alert")
	}
	// Alerts first, firing before pending, then the models, alerting first.
	order := []string{"fraud-recall-floor", "desk-slow", "<h2>Models", `href="/models/card-screen"`, `href="/models/%3Cb%3Edesk%3C%2Fb%3E"`}
	rest := page
	for _, s := range order {
		i := strings.Index(rest, s)
		if i < 0 {
			t.Errorf("%q is missing or not after what precedes it in %v", s, order)
			break
		}
		rest = rest[i:]
	}
	if w, l := strings.Index(page, "fraud <b>"), strings.Index(page, "legit <b>"); w < 0 || l < 0 || w > l {
		t.Errorf("worst class is not first: fraud at %d, legit at %d", w, l)
	}
	selfContained(t, page)
	if status, _ := b.get(t, "/no-such-page", nil); status != http.StatusNotFound {
		t.Errorf("GET /no-such-page: %d, want 404", status)
	}
}

var cellRE = regexp.MustCompile(`data-actual="([^"]*)" data-predicted="([^"]*)" data-count="(\d+)"`)

func TestModelPage(t *testing.T) {
	b := setup(t)
	b.predict(t, "card-screen", cardClasses,
		store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud", Segment: "web"},
		store.Prediction{ID: "txn-2", At: at(2), Predicted: "legit", Segment: "web"},
		store.Prediction{ID: "txn-3", At: at(3), Predicted: "legit", Segment: "pos"},
		store.Prediction{ID: "txn-4", At: at(-180), Predicted: "legit", Segment: "pos"})
	b.label(t, "card-screen",
		store.Label{ID: "txn-1", Actual: "fraud", At: at(3)},
		store.Label{ID: "txn-2", Actual: "fraud", At: at(4)},
		store.Label{ID: "txn-3", Actual: "legit", At: at(5)},
		store.Label{ID: "txn-4", Actual: "legit", At: at(5)})
	b.saveAlert(t, "fraud-recall-drop", "card-screen", "fraud", "firing", at(10), 0.5, [2]float64{0.09, 0.91}, false)

	status, page := b.page(t, "/models/card-screen")
	if status != http.StatusOK {
		t.Fatalf("GET model page: %d\n%s", status, page)
	}
	// Window 1h at watermark 12:05 holds txn-1..3: matrix rows actual.
	want := map[[2]string]int64{{"legit", "legit"}: 1, {"legit", "fraud"}: 0, {"fraud", "legit"}: 1, {"fraud", "fraud"}: 1}
	checkCells(t, page, "Window 1h ", want)
	for _, s := range []string{
		"Window 1h", "Window 30m-matured", "matured, lag 30m", "audit report of this window",
		"/v1/models/card-screen/report?from=2026-03-01T11%3A05%3A00Z&amp;to=2026-03-01T12%3A05%3A00Z",
		"Rule fraud-recall-drop: current and reference period", "reference period of rule fraud-recall-drop",
		"fraud recall", "legit prevalence", "One point per 1h",
		`<form class="seg" method="get"`,
	} {
		if !strings.Contains(page, s) {
			t.Errorf("model page lacks %q", s)
		}
	}
	selfContained(t, page)

	status, page = b.page(t, "/models/card-screen?segment=web")
	if status != http.StatusOK {
		t.Fatalf("GET model page of a segment: %d", status)
	}
	checkCells(t, page, "Window 1h ", map[[2]string]int64{{"legit", "legit"}: 0, {"fraud", "legit"}: 1, {"fraud", "fraud"}: 1})

	status, page = b.page(t, "/models/no-such-model")
	if status != http.StatusNotFound || !strings.Contains(page, `No model named &#34;no-such-model&#34;`) {
		t.Errorf("unknown model page: %d, want a 404 page naming it", status)
	}
}

// checkCells compares the first heatmap after marker with want.
func checkCells(t *testing.T, page, marker string, want map[[2]string]int64) {
	t.Helper()
	i := strings.Index(page, marker)
	if i < 0 {
		t.Fatalf("page has no %q", marker)
	}
	got := map[[2]string]int64{}
	for _, m := range cellRE.FindAllStringSubmatch(page[i:], 4) {
		n, _ := strconv.ParseInt(m[3], 10, 64)
		got[[2]string{m[1], m[2]}] = n
	}
	for k, n := range want {
		if got[k] != n {
			t.Errorf("%s: cell %v = %d, want %d (cells %v)", marker, k, got[k], n, got)
		}
	}
}
