package alerts

import (
	"bytes"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"os/exec"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"
	"github.com/prometheus/common/expfmt"
)

func get(tb testing.TB, mux *http.ServeMux, target string) (int, []byte) {
	tb.Helper()
	rec := httptest.NewRecorder()
	mux.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, target, nil))
	return rec.Code, rec.Body.Bytes()
}

func TestHTTP(t *testing.T) {
	b := setup(t)
	m := b.manager(t, b.options(floorRule(1, 1)))
	mux := http.NewServeMux()
	m.Register(mux)

	code, body := get(t, mux, "/v1/alerts")
	if code != http.StatusOK || strings.TrimSpace(string(body)) != `{"alerts":[],"undelivered":[]}` {
		t.Fatalf("GET /v1/alerts before any alert: %d %s", code, body)
	}

	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m, t0)
	b.views.set(t, "card-fraud", dayWindow, binary, goodRecall, nil)
	evaluate(t, m, t0.Add(time.Minute))
	evaluate(t, m, t0.Add(2*time.Minute)) // resolved → inactive
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m, t0.Add(3*time.Minute))

	code, body = get(t, mux, "/v1/alerts")
	var cur alertsResponse
	if err := json.Unmarshal(body, &cur); code != http.StatusOK || err != nil {
		t.Fatalf("GET /v1/alerts: %d %s (%v)", code, body, err)
	}
	if len(cur.Alerts) != 1 {
		t.Fatalf("GET /v1/alerts: %d alerts, want 1: %s", len(cur.Alerts), body)
	}
	a := cur.Alerts[0]
	if a.State != StateFiring || a.Class != "fraud" || !a.StartsAt.Equal(t0.Add(3*time.Minute)) ||
		a.Result.Value == nil || *a.Result.Value != 0.4 || a.Result.Interval == nil || a.Labels["team"] != "payments-risk" {
		t.Errorf("GET /v1/alerts alert = %+v", a)
	}

	code, body = get(t, mux, "/v1/alerts/history?from=2026-03-01T12:01:00Z&to=2026-03-01T12:04:00Z&limit=2")
	var hist struct {
		History []historyEntry `json:"history"`
	}
	if err := json.Unmarshal(body, &hist); code != http.StatusOK || err != nil {
		t.Fatalf("GET /v1/alerts/history: %d %s (%v)", code, body, err)
	}
	var got []string
	for _, h := range hist.History {
		got = append(got, string(h.State)+"@"+h.UpdatedAt.Format("15:04"))
	}
	if want := "firing@12:03 inactive@12:02"; strings.Join(got, " ") != want {
		t.Errorf("history = %v, want %s (newest first, limit 2)", got, want)
	}

	for _, q := range []string{"from=yesterday", "limit=0", "limit=x", "from=2026-03-02T00:00:00Z&to=2026-03-01T00:00:00Z"} {
		if code, body := get(t, mux, "/v1/alerts/history?"+q); code != http.StatusBadRequest || !strings.Contains(string(body), `"error"`) {
			t.Errorf("GET /v1/alerts/history?%s = %d %s, want 400 with an error", q, code, body)
		}
	}
}

// TestMetrics checks the alert metrics by name and value, and that
// promtool finds nothing to complain about in them.
func TestMetrics(t *testing.T) {
	b := setup(t)
	opts := b.options(floorRule(1, 1))
	opts.Notifiers = []NotifierConfig{newHook(t).config()}
	m := b.manager(t, opts)
	start(t, m)
	b.views.set(t, "card-fraud", dayWindow, binary, badRecall, nil)
	evaluate(t, m, t0)

	want := `
# HELP classwatch_alert_evaluations_total Evaluations of each alert rule.
# TYPE classwatch_alert_evaluations_total counter
classwatch_alert_evaluations_total{rule="fraud-recall-floor"} 1
# HELP classwatch_alert_evaluator_leader 1 while this replica holds the alert evaluator lock, else 0.
# TYPE classwatch_alert_evaluator_leader gauge
classwatch_alert_evaluator_leader 1
# HELP classwatch_alert_last_evaluation_timestamp_seconds Scheduled time of the latest alert evaluation on this replica, in seconds since the Unix epoch.
# TYPE classwatch_alert_last_evaluation_timestamp_seconds gauge
classwatch_alert_last_evaluation_timestamp_seconds 1.7723664e+09
# HELP classwatch_alert_state 1 for each alert that is pending, firing or just resolved, labelled with its state; only the replica holding the evaluator lock reports alerts.
# TYPE classwatch_alert_state gauge
classwatch_alert_state{class="fraud",model="card-fraud",predicted="",rule="fraud-recall-floor",state="firing"} 1
`
	if err := testutil.GatherAndCompare(b.reg, strings.NewReader(want),
		"classwatch_alert_evaluations_total", "classwatch_alert_evaluator_leader",
		"classwatch_alert_last_evaluation_timestamp_seconds", "classwatch_alert_state"); err != nil {
		t.Error(err)
	}

	promtool := needBinary(t, "promtool")
	families, err := b.reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	var text bytes.Buffer
	enc := expfmt.NewEncoder(&text, expfmt.NewFormat(expfmt.TypeTextPlain))
	for _, f := range families {
		if err := enc.Encode(f); err != nil {
			t.Fatal(err)
		}
	}
	cmd := exec.Command(promtool, "check", "metrics")
	cmd.Stdin = &text
	if out, err := cmd.CombinedOutput(); err != nil || len(bytes.TrimSpace(out)) > 0 {
		t.Errorf("promtool check metrics: %v\n%s", err, out)
	}
}
