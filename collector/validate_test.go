package collector_test

import (
	"fmt"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/classwatch/classwatch/collector"
)

func TestLineValidation(t *testing.T) { eachStore(t, testLineValidation) }

// testLineValidation checks that the line rules of collector/doc.go hold
// the same on both stores: before them, a NUL in an id stored on SQLite and
// failed the whole batch with 503 on PostgreSQL, and invalid UTF-8 was
// silently replaced with U+FFFD.
func testLineValidation(t *testing.T, be backend) {
	b := setup(t, be, nil)
	code, r, _ := b.post(t, "/v1/predictions", ndjson, lines(
		`{"model":"card-fraud","id":"ok-1","predicted":"legit"}`,
		`{"model":"card-fraud","id":"nul\u0000id","predicted":"legit"}`,
		`{"model":"card-fraud","id":"ok-2","predicted":"legit","segment":"web\u0007"}`,
		`{"model":"card-fraud","id":"c1\u0085","predicted":"legit"}`,
		"{\"model\":\"card-fraud\",\"id\":\"bad-\xff\",\"predicted\":\"legit\"}",
		`{"model":"card-fraud","id":"half-\ud800","predicted":"legit"}`,
		`{"model":"card-fraud","id":"twice","id":"again","predicted":"legit"}`,
		`{"model":"card-fraud","ID":"upper","predicted":"legit"}`,
		`{"model":"card-fraud","id":"case","Id":"case-2","predicted":"legit"}`,
		`{"model":"card-fraud","id":"dup-score","predicted":"legit","scores":{"legit":0.5,"legit":0.4}}`,
		`{"model":"card-fraud","id":"sum","predicted":"legit","scores":{"legit":0.9,"fraud":0.6}}`,
		`{"model":"card-fraud","id":"partial","predicted":"legit","scores":{"legit":0.7}}`,
		`{"model":"card-fraud","id":"rounded","predicted":"fraud","scores":{"legit":0.34,"fraud":0.68}}`,
		`{"model":"card-fraud","id":"pair-\ud83d\ude00","predicted":"legit"}`,
		`{"model":"card-\u0000fraud","id":"m","predicted":"legit"}`,
		`{"model":"card-fraud","id":"cls","predicted":"le\u001fgit"}`,
	))
	if code != http.StatusOK {
		t.Fatalf("status %d (%+v), want 200: bad lines must not sink the batch", code, r)
	}
	checkRejected(t, r.Rejected, []rejected{
		{2, `"id" holds the control character U+0000`},
		{3, `"segment" holds the control character U+0007`},
		{4, `"id" holds the control character U+0085`},
		{5, "line is not valid UTF-8"},
		{6, `lone UTF-16 surrogate \ud800`},
		{7, `field "id" appears twice`},
		{8, `unknown field "ID" (field names are case-sensitive: "id")`},
		{9, `unknown field "Id"`},
		{10, `"scores": "legit" appears twice`},
		{11, `"scores" sum to 1.5, more than 1`},
		{15, `"model" holds the control character U+0000`},
		{16, `class name holds the control character U+001F`},
	})
	if r.Accepted != 4 {
		t.Errorf("accepted = %d, want 4 (ok-1, partial, rounded, pair)", r.Accepted)
	}
	if info := b.modelInfo(t, "card-fraud"); info.Predictions != 4 {
		t.Errorf("stored predictions = %d, want 4", info.Predictions)
	}
	code, r, _ = b.post(t, "/v1/labels", ndjson, lines(
		`{"model":"card-fraud","id":"ok-1","actual":"fraud"}`,
		`{"model":"card-fraud","id":"ok-1\u0000","actual":"fraud"}`,
		`{"model":"card-fraud","id":"ok-2","actual":"fraud","actual":"legit"}`,
		`{"model":"card-fraud","id":"ok-2","Actual":"fraud"}`,
	))
	if code != http.StatusOK || r.Accepted != 1 {
		t.Fatalf("labels: %d %+v", code, r)
	}
	checkRejected(t, r.Rejected, []rejected{
		{2, `"id" holds the control character U+0000`},
		{3, `field "actual" appears twice`},
		{4, `unknown field "Actual"`},
	})
}

func TestRetentionHorizon(t *testing.T) { eachStore(t, testRetentionHorizon) }

// testRetentionHorizon checks that a prediction older than its model's
// retention is rejected with a line error naming the limit, since
// retention would purge it (and each old day costs a partition).
func testRetentionHorizon(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) {
		o.Models = []collector.ModelPolicy{{Name: "card-fraud", Classes: []string{"legit", "fraud"}, Bucket: time.Hour, Retention: 30 * 24 * time.Hour}}
	})
	// receiveTime is 2026-03-01T12:30Z; the cutoff is the start of the
	// bucket holding 2026-01-30T12:30Z, 2026-01-30T12:00Z.
	code, r, _ := b.post(t, "/v1/predictions", ndjson, lines(
		`{"model":"card-fraud","id":"old","at":"1970-01-02T00:00:00Z","predicted":"legit"}`,
		`{"model":"card-fraud","id":"edge-out","at":"2026-01-30T11:59:59Z","predicted":"legit"}`,
		`{"model":"card-fraud","id":"edge-in","at":"2026-01-30T12:00:00Z","predicted":"legit"}`,
		`{"model":"card-fraud","id":"recent","at":"2026-02-20T00:00:00Z","predicted":"legit"}`,
	))
	if code != http.StatusOK || r.Accepted != 2 {
		t.Fatalf("status %d, %+v; want 200 with 2 accepted", code, r)
	}
	checkRejected(t, r.Rejected, []rejected{
		{1, `"at": 1970-01-02T00:00:00Z is older than the model's retention of 720h0m0s (buckets before 2026-01-30T12:00:00Z are purged)`},
		{2, `older than the model's retention`},
	})
}

// TestStoreLimit checks that a batch the store refuses as a whole for a
// documented limit (PostgreSQL: more new label-history day partitions than
// one batch may create) has every line rejected with the limit named and
// answers 400, not 503: a client or a stream would otherwise resend it for
// ever. The same labels sent in two parts are joined.
func TestStoreLimit(t *testing.T) {
	b := setup(t, postgresBackend(), func(o *collector.Options) {
		o.Models = []collector.ModelPolicy{{Name: "card-fraud", Classes: []string{"legit", "fraud"}, Bucket: time.Hour}}
	})
	const days = 367 // one more day than pgstore's per-batch limit
	start := time.Date(2025, 2, 1, 12, 0, 0, 0, time.UTC)
	var preds, labels []string
	for d := range days {
		at := start.Add(time.Duration(d) * 24 * time.Hour).Format(time.RFC3339)
		preds = append(preds, fmt.Sprintf(`{"model":"card-fraud","id":"p-%03d","at":%q,"predicted":"legit"}`, d, at))
		labels = append(labels, fmt.Sprintf(`{"model":"card-fraud","id":"p-%03d","actual":"fraud"}`, d))
	}
	if code, r, _ := b.post(t, "/v1/predictions", ndjson, lines(preds...)); code != http.StatusOK || r.Accepted != days {
		t.Fatalf("predictions: status %d, %+v", code, r)
	}
	code, r, _ := b.post(t, "/v1/labels", ndjson, lines(labels...))
	if code != http.StatusBadRequest || r.Accepted != 0 || len(r.Rejected)+r.RejectedOmitted != days {
		t.Fatalf("labels over %d days: status %d, accepted %d, %d rejected; want 400 with every line rejected", days, code, r.Accepted, len(r.Rejected)+r.RejectedOmitted)
	}
	if got := r.Rejected[0]; got.Line != 1 || !strings.Contains(got.Error, "more than the 366 one batch may create") {
		t.Errorf("first rejection %+v; want line 1 naming the limit", got)
	}
	for _, part := range [][]string{labels[:200], labels[200:]} {
		if code, r, _ := b.post(t, "/v1/labels", ndjson, lines(part...)); code != http.StatusOK || r.Accepted != len(part) {
			t.Fatalf("labels in parts: status %d, %+v", code, r)
		}
	}
}
