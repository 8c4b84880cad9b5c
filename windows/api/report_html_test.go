package api_test

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"net/http"
	"net/url"
	"reflect"
	"regexp"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/api"
	"github.com/classwatch/classwatch/windows/store"
)

var dataBlockRE = regexp.MustCompile(`(?s)<script type="application/json" id="classwatch-report">(.*?)</script>`)

// reportData extracts the embedded data block of a report page.
func reportData(t *testing.T, page string) map[string]json.RawMessage {
	t.Helper()
	m := dataBlockRE.FindStringSubmatch(page)
	if m == nil {
		t.Fatalf("report has no classwatch-report data block:\n%s", page)
	}
	var out map[string]json.RawMessage
	if err := json.Unmarshal([]byte(m[1]), &out); err != nil {
		t.Fatalf("data block is not JSON: %v", err)
	}
	return out
}

func reportPath(model string, params url.Values) string {
	return "/v1/models/" + url.PathEscape(model) + "/report?" + params.Encode()
}

// fillReportScenario stores a period with a correction after the as-of
// time used by the tests and an alert that fired in the period.
func fillReportScenario(t *testing.T, b *testBundle) {
	b.predict(t, "card-screen", cardClasses,
		store.Prediction{ID: "txn-1", At: at(1), Predicted: "fraud"},
		store.Prediction{ID: "txn-2", At: at(2), Predicted: "legit"},
		store.Prediction{ID: "txn-3", At: at(3), Predicted: "legit"},
		store.Prediction{ID: "txn-4", At: at(70), Predicted: "legit"})
	b.label(t, "card-screen",
		store.Label{ID: "txn-1", Actual: "fraud", At: at(3)},      // 2m after the prediction
		store.Label{ID: "txn-2", Actual: "legit", At: at(62)},     // 1h after
		store.Label{ID: "txn-2", Actual: "fraud", At: at(180)},    // corrected after the as-of time
		store.Label{ID: "txn-3", Actual: "legit", At: at(3 * 60)}) // 2h57m after
	b.saveAlert(t, "fraud-recall-floor", "card-screen", "fraud", "firing", at(30), 0.5, [2]float64{0.09, 0.91}, true)
}

func TestReportEmbedsTheMatrixAnswer(t *testing.T) {
	b := setup(t)
	fillReportScenario(t, b)
	params := url.Values{"from": {rfc(t0)}, "to": {rfc(at(120))}, "as_of": {rfc(at(120))}}
	status, page := b.page(t, reportPath("card-screen", params))
	if status != http.StatusOK {
		t.Fatalf("report: %d\n%s", status, page)
	}
	selfContained(t, page)
	data := reportData(t, page)
	var matrix map[string]json.RawMessage
	if status, raw := b.get(t, matrixPath("card-screen", params), &matrix); status != http.StatusOK {
		t.Fatalf("matrix: %d %s", status, raw)
	}
	for k, v := range matrix {
		if !jsonEqual(t, data[k], v) {
			t.Errorf("report data %q = %s, matrix endpoint says %s", k, data[k], v)
		}
	}
	// As of 14:00 txn-1 was fraud and txn-2 legit; txn-3's label came at
	// 15:00, when txn-2 was also corrected to fraud.
	checkCells(t, page, "<h2>Confusion matrix</h2>", map[[2]string]int64{{"legit", "legit"}: 1, {"fraud", "fraud"}: 1, {"fraud", "legit"}: 0})
	var changes []api.CellChange
	mustUnmarshal(t, data["changed_since_as_of"], &changes)
	// legit→legit loses txn-2 and gains txn-3: that cell does not move.
	want := []api.CellChange{{Actual: "fraud", Predicted: "legit", AsOf: 0, Now: 1}}
	if !sameChanges(changes, want) {
		t.Errorf("changes = %+v, want %+v", changes, want)
	}
	var delays api.LabelDelays
	mustUnmarshal(t, data["label_delays"], &delays)
	// Known at 14:00: txn-1 after 2m (<5m), txn-2 after 1h (1h–6h); txn-3's
	// label came at 15:00 and txn-4 has none.
	if !slices.Equal(delays.Counts, []int64{1, 0, 1, 0, 0, 0, 0, 0}) || delays.WithoutRealLabel != 2 {
		t.Errorf("label delays = %+v, want 1 below 5m, 1 in 1h–6h, 2 without a label", delays)
	}
	var fired []api.FiredAlert
	mustUnmarshal(t, data["alerts_fired"], &fired)
	if len(fired) != 1 || fired[0].Rule != "fraud-recall-floor" || !strings.Contains(page, "fraud-recall-floor") {
		t.Errorf("alerts fired = %+v, want fraud-recall-floor", fired)
	}
	var verify api.VerifyStatus
	mustUnmarshal(t, data["verify"], &verify)
	if verify.Status != "match" {
		t.Errorf("verify = %+v, want match", verify)
	}
	for _, s := range []string{"not a validation of the model", "@media print", "break-inside:avoid", "Label coverage and label delay"} {
		if !strings.Contains(page, s) {
			t.Errorf("report lacks %q", s)
		}
	}
	checkFingerprint(t, page, data)
}

// checkFingerprint recomputes the fingerprint from the data block, as the
// report tells an auditor to.
func checkFingerprint(t *testing.T, page string, data map[string]json.RawMessage) string {
	t.Helper()
	kept := map[string]json.RawMessage{}
	for _, k := range api.FingerprintFields() {
		if v, ok := data[k]; ok {
			kept[k] = v
		}
	}
	raw, _ := json.Marshal(kept)
	canon, err := api.Canonical(raw)
	if err != nil {
		t.Fatal(err)
	}
	sum := sha256.Sum256(canon)
	want := hex.EncodeToString(sum[:])
	var got string
	mustUnmarshal(t, data["fingerprint"], &got)
	if got != want || !strings.Contains(page, "sha256:"+want) {
		t.Errorf("fingerprint %s, recomputed %s", got, want)
	}
	return got
}

func TestReportReproducesItsFingerprint(t *testing.T) {
	b := setup(t)
	fillReportScenario(t, b)
	params := url.Values{"from": {rfc(t0)}, "to": {rfc(at(120))}}
	_, first := b.page(t, reportPath("card-screen", params))
	data := reportData(t, first)
	fp := checkFingerprint(t, first, data)
	var asOf time.Time
	mustUnmarshal(t, data["as_of"], &asOf)
	params.Set("as_of", asOf.Format(time.RFC3339Nano))
	_, again := b.page(t, reportPath("card-screen", params))
	if fp2 := checkFingerprint(t, again, reportData(t, again)); fp2 != fp {
		t.Errorf("report as of its own as-of time has fingerprint %s, the original %s", fp2, fp)
	}
	params.Set("as_of", rfc(at(120)))
	_, earlier := b.page(t, reportPath("card-screen", params))
	if fp3 := checkFingerprint(t, earlier, reportData(t, earlier)); fp3 == fp {
		t.Error("a report as of an earlier time, with other labels, has the same fingerprint")
	}
}

func TestReportBadInput(t *testing.T) {
	b := setup(t)
	fillReportScenario(t, b)
	for _, tc := range []struct {
		name   string
		path   string
		status int
		want   string
	}{
		{"misaligned", reportPath("card-screen", url.Values{"from": {"2026-03-01T12:03:00Z"}, "to": {rfc(at(60))}}), 400,
			"use 2026-03-01T12:00:00Z or 2026-03-01T12:05:00Z"},
		{"inverted", reportPath("card-screen", url.Values{"from": {rfc(at(60))}, "to": {rfc(t0)}}), 400, "must be after from"},
		{"unknown model", reportPath("no-such-model", url.Values{"from": {rfc(t0)}, "to": {rfc(at(60))}}), 404, "No model named &#34;no-such-model&#34;"},
		{"no data", reportPath("card-screen", url.Values{"from": {rfc(at(-600))}, "to": {rfc(at(-300))}}), 200, "No prediction was logged in this period"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			status, page := b.page(t, tc.path)
			if status != tc.status || !strings.Contains(page, tc.want) {
				t.Errorf("GET %s: %d, want %d saying %q\n%s", tc.path, status, tc.status, tc.want, page)
			}
		})
	}
}

func jsonEqual(t *testing.T, a, b json.RawMessage) bool {
	t.Helper()
	var x, y any
	if err := json.Unmarshal(a, &x); err != nil {
		return false
	}
	if err := json.Unmarshal(b, &y); err != nil {
		return false
	}
	return reflect.DeepEqual(x, y)
}

func mustUnmarshal(t *testing.T, raw json.RawMessage, v any) {
	t.Helper()
	if err := json.Unmarshal(raw, v); err != nil {
		t.Fatalf("decode %s: %v", raw, err)
	}
}

func sameChanges(got, want []api.CellChange) bool {
	if len(got) != len(want) {
		return false
	}
	for _, w := range want {
		if !slices.Contains(got, w) {
			return false
		}
	}
	return true
}
