package collector_test

import (
	"bytes"
	"compress/gzip"
	"context"
	"fmt"
	"io"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/classwatch/classwatch/collector"
)

func TestStatusCodes(t *testing.T) { eachStore(t, testStatusCodes) }

func testStatusCodes(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) {
		o.Tokens = []collector.Token{
			{Name: "desk", Secret: "s3cret-desk", Models: []string{"ticket-route"}},
			{Name: "all", Secret: "s3cret-all"},
		}
		o.Limits.MaxBodyBytes = 4096
		o.Limits.MaxLineBytes = 200
	})
	good := `{"model":"card-fraud","id":"ok-%d","predicted":"legit"}` + "\n"
	desk := "Bearer s3cret-desk"
	all := "Bearer s3cret-all"
	var gz bytes.Buffer
	zw := gzip.NewWriter(&gz)
	fmt.Fprintf(zw, good, 100)
	zw.Close()
	var bomb bytes.Buffer
	zw = gzip.NewWriter(&bomb)
	zw.Write(bytes.Repeat([]byte("\n"), 10000))
	zw.Close()

	cases := []struct {
		name        string
		contentType string
		body        string
		header      []string
		want        int
		wantError   string
	}{
		{"no token", ndjson, fmt.Sprintf(good, 1), nil, 401, "bearer token"},
		{"wrong token", ndjson, fmt.Sprintf(good, 1), []string{"Authorization", "Bearer nope"}, 401, "bearer token"},
		{"basic auth", ndjson, fmt.Sprintf(good, 1), []string{"Authorization", "Basic czNjcmV0LWFsbA=="}, 401, "bearer token"},
		{"token not allowed for the model", ndjson, fmt.Sprintf(good, 1), []string{"Authorization", desk}, 403, "may not write"},
		{"token allowed", ndjson, fmt.Sprintf(good, 2), []string{"Authorization", all}, 200, ""},
		{"lowercase scheme", ndjson, fmt.Sprintf(good, 3), []string{"Authorization", "bearer s3cret-all"}, 200, ""},
		{"missing content type", "", fmt.Sprintf(good, 4), []string{"Authorization", all}, 415, "content type"},
		{"text/plain", "text/plain", fmt.Sprintf(good, 4), []string{"Authorization", all}, 415, "text/plain"},
		{"latin-1", ndjson + "; charset=iso-8859-1", fmt.Sprintf(good, 4), []string{"Authorization", all}, 415, "charset"},
		{"empty body", ndjson, "\n\n", []string{"Authorization", all}, 400, "no lines"},
		{"every line rejected", ndjson, "{}\n{}\n", []string{"Authorization", all}, 400, "every line"},
		{"body over the limit", ndjson, strings.Repeat(fmt.Sprintf(good, 5), 100), []string{"Authorization", all}, 413, "4096-byte"},
		{"line over the limit", ndjson, fmt.Sprintf(good, 6) + `{"model":"card-fraud","id":"` + strings.Repeat("x", 300) + `"}` + "\n", []string{"Authorization", all}, 413, "line 2 is longer than the 200-byte"},
		{"gzip", ndjson, gz.String(), []string{"Authorization", all, "Content-Encoding", "gzip"}, 200, ""},
		{"gzip over the limit once decoded", ndjson, bomb.String(), []string{"Authorization", all, "Content-Encoding", "gzip"}, 413, "4096-byte"},
		{"brotli", ndjson, fmt.Sprintf(good, 7), []string{"Authorization", all, "Content-Encoding", "br"}, 415, "encoding"},
		{"broken gzip", ndjson, "not gzip", []string{"Authorization", all, "Content-Encoding", "gzip"}, 400, "gzip"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			code, r, h := b.post(t, "/v1/predictions", tc.contentType, tc.body, tc.header...)
			if code != tc.want {
				t.Fatalf("status = %d, want %d (%+v)", code, tc.want, r)
			}
			if !strings.Contains(r.Error, tc.wantError) {
				t.Errorf("error = %q, want it to contain %q", r.Error, tc.wantError)
			}
			if code == 401 && h.Get("WWW-Authenticate") == "" {
				t.Errorf("401 without WWW-Authenticate")
			}
		})
	}

	// A token allowed for some lines' models only gets the other lines
	// rejected, with 200 for the rest.
	code, r, _ := b.post(t, "/v1/predictions", ndjson, lines(
		`{"model":"ticket-route","id":"t-1","predicted":"billing"}`,
		`{"model":"card-fraud","id":"c-1","predicted":"legit"}`,
	), "Authorization", desk)
	if code != 200 || r.Accepted != 1 {
		t.Errorf("mixed models: %d %+v", code, r)
	}
	checkRejected(t, r.Rejected, []rejected{{2, `token "desk" may not write model "card-fraud"`}})

	// The body over the limit sent chunked (no Content-Length) is caught
	// while reading.
	req, _ := http.NewRequest(http.MethodPost, b.srv.URL+"/v1/predictions", io.MultiReader(strings.NewReader(strings.Repeat(fmt.Sprintf(good, 8), 100))))
	req.Header.Set("Content-Type", ndjson)
	req.Header.Set("Authorization", all)
	req.ContentLength = -1
	if code, r, _ := do(t, req); code != 413 {
		t.Errorf("chunked body over the limit: %d %+v", code, r)
	}
	if got := b.modelInfo(t, "card-fraud").Predictions; got != 3 {
		t.Errorf("stored card-fraud predictions = %d, want 3 (ok-2, ok-3, ok-100)", got)
	}
}

func TestStoreUnavailable(t *testing.T) { eachStore(t, testStoreUnavailable) }

func testStoreUnavailable(t *testing.T, be backend) {
	b := setup(t, be, nil)
	if code, r, _ := b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"kept","predicted":"legit"}`); code != 200 {
		t.Fatalf("first batch: %d %+v", code, r)
	}
	b.store.Close()
	code, r, h := b.post(t, "/v1/predictions", ndjson, lines(
		`{"model":"card-fraud","id":"lost-1","predicted":"legit"}`,
		`{"model":"card-fraud","id":"lost-2","predicted":"fraud"}`,
	))
	if code != http.StatusServiceUnavailable {
		t.Fatalf("status = %d, want 503 (%+v)", code, r)
	}
	if h.Get("Retry-After") != "5" {
		t.Errorf("Retry-After = %q, want 5", h.Get("Retry-After"))
	}
	if r.Accepted != 0 || r.Error == "" {
		t.Errorf("response = %+v", r)
	}
	if code, _, _ := b.post(t, "/v1/labels", ndjson, `{"model":"card-fraud","id":"kept","actual":"legit"}`); code != 503 {
		t.Errorf("labels status = %d, want 503", code)
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_collector_store_errors_total", "ingest_predictions")); got != 1 {
		t.Errorf("store errors = %v, want 1", got)
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_predictions_received_total", "card-fraud")); got != 1 {
		t.Errorf("predictions received = %v, want 1: a failed batch is not counted", got)
	}

	reopened := b.reopen(t)
	infos, err := reopened.Models(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	for _, m := range infos {
		if m.Name == "card-fraud" && (m.Predictions != 1 || m.Labeled != 0) {
			t.Errorf("after the failed batches: %d predictions, %d labeled; want 1, 0", m.Predictions, m.Labeled)
		}
	}
}

func TestOverload(t *testing.T) { eachStore(t, testOverload) }

func testOverload(t *testing.T, be backend) {
	entered := make(chan struct{})
	gate := make(chan struct{})
	b := setup(t, be, func(o *collector.Options) {
		o.Limits.MaxInFlight = 1
		o.Limits.QueueWait = 50 * time.Millisecond
		o.Limits.RetryAfter = 2 * time.Second
		o.Store = pausingStore{Store: o.Store, pause: func() {
			entered <- struct{}{}
			<-gate
		}}
	})
	first := make(chan int, 1)
	go func() {
		resp, err := http.Post(b.srv.URL+"/v1/predictions", ndjson, strings.NewReader(`{"model":"card-fraud","id":"slow","predicted":"legit"}`))
		if err != nil {
			first <- 0
			return
		}
		resp.Body.Close()
		first <- resp.StatusCode
	}()
	<-entered // the first batch holds the only slot
	if got := testutil.ToFloat64(metric(t, b, "classwatch_collector_in_flight_batches")); got != 1 {
		t.Errorf("in flight = %v, want 1", got)
	}
	code, r, h := b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"queued","predicted":"legit"}`)
	if code != http.StatusServiceUnavailable || h.Get("Retry-After") != "2" || !strings.Contains(r.Error, "in flight") {
		t.Errorf("second batch while the slot is taken: %d %q %+v", code, h.Get("Retry-After"), r)
	}
	close(gate)
	if code := <-first; code != 200 {
		t.Errorf("first batch: status %d, want 200", code)
	}
	go func() {
		for range entered {
		}
	}()
	if code, r, _ := b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"queued","predicted":"legit"}`); code != 200 || r.Accepted != 1 {
		t.Errorf("retry after the slot freed: %d %+v", code, r)
	}
	close(entered)
	if got := testutil.ToFloat64(metric(t, b, "classwatch_collector_queue_timeouts_total", "predictions")); got != 1 {
		t.Errorf("queue timeouts = %v, want 1", got)
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_collector_in_flight_batches")); got != 0 {
		t.Errorf("in flight after the batches = %v, want 0", got)
	}
}
