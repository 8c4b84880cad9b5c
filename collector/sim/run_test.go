package sim

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"
)

// request is one body a test receiver got.
type request struct {
	path        string
	contentType string
	body        []byte
}

// receiver is an httptest server standing in for the daemon's ingest
// endpoints: it records every body and answers in the shape of README.md "HTTP API",
// rejecting the lines that are not valid for the scenario.
type receiver struct {
	// throttleFirst answers the first request 429 with Retry-After: 1.
	throttleFirst bool
	// status, when non-zero, is every request's answer.
	status int

	mu       sync.Mutex
	requests []request
}

func (rc *receiver) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	body, err := io.ReadAll(r.Body)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadRequest)
		return
	}
	rc.mu.Lock()
	rc.requests = append(rc.requests, request{r.URL.Path, r.Header.Get("Content-Type"), body})
	first := len(rc.requests) == 1
	status := rc.status
	rc.mu.Unlock()
	switch {
	case status != 0:
		http.Error(w, `{"error":"no"}`, status)
		return
	case first && rc.throttleFirst:
		w.Header().Set("Retry-After", "1")
		w.WriteHeader(http.StatusTooManyRequests)
		return
	}
	valid := validPrediction
	if r.URL.Path == "/v1/labels" {
		valid = func(data []byte) (wirePrediction, time.Time, bool) {
			_, at, ok := validLabel(data)
			return wirePrediction{}, at, ok
		}
	}
	type rejection struct {
		Line  int    `json:"line"`
		Error string `json:"error"`
	}
	out := struct {
		Accepted   int         `json:"accepted"`
		Duplicates int         `json:"duplicates"`
		Rejected   []rejection `json:"rejected"`
	}{Rejected: []rejection{}}
	sc := bufio.NewScanner(bytes.NewReader(body))
	for n := 1; sc.Scan(); n++ {
		if _, _, ok := valid(sc.Bytes()); ok {
			out.Accepted++
		} else {
			out.Rejected = append(out.Rejected, rejection{n, "invalid"})
		}
	}
	if out.Accepted == 0 {
		w.WriteHeader(http.StatusBadRequest)
	}
	json.NewEncoder(w).Encode(out)
}

func (rc *receiver) recorded() []request {
	rc.mu.Lock()
	defer rc.mu.Unlock()
	return append([]request(nil), rc.requests...)
}

// lines splits an NDJSON body; every line must end with a newline.
func lines(t *testing.T, body []byte) [][]byte {
	t.Helper()
	if len(body) == 0 || body[len(body)-1] != '\n' {
		t.Fatalf("body does not end with a newline: %q", body)
	}
	return bytes.Split(body[:len(body)-1], []byte("\n"))
}

func TestRun(t *testing.T) {
	rc := &receiver{throttleFirst: true}
	srv := httptest.NewServer(rc)
	defer srv.Close()

	// Start two simulated days back so the simulated clock, which may not
	// pass the wall clock, has room to cover one day.
	opts := Options{
		Start:    time.Now().UTC().Truncate(time.Hour).Add(-2 * day),
		Speed:    4 * 86400, // four simulated days per real second
		Seed:     11,
		Duration: day,
		Interval: 50 * time.Millisecond,
		MaxLines: 300,
	}
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	var last Stats
	rounds := 0
	err := Run(ctx, opts, srv.URL+"/", nil, func(s Stats) { last = s; rounds++ })
	if err != nil {
		t.Fatalf("Run: %v", err)
	}
	if rounds == 0 {
		t.Fatalf("progress never called")
	}
	if want := opts.Start.Add(opts.Duration); !last.SimTime.Equal(want) {
		t.Errorf("final SimTime = %v, want %v", last.SimTime, want)
	}

	reqs := rc.recorded()
	if len(reqs) < 3 {
		t.Fatalf("%d requests, want several", len(reqs))
	}
	// The 429 asked for one second: the same body comes again.
	if reqs[0].path != "/v1/predictions" || reqs[1].path != reqs[0].path || !bytes.Equal(reqs[1].body, reqs[0].body) {
		t.Errorf("request after 429 went to %s with a different body; want the same body again", reqs[1].path)
	}
	if last.Retries != 1 {
		t.Errorf("Retries = %d, want 1", last.Retries)
	}

	var preds, labels, rejected int
	for i, r := range reqs {
		if r.contentType != "application/x-ndjson" {
			t.Errorf("request %d: Content-Type %q, want application/x-ndjson", i, r.contentType)
		}
		ls := lines(t, r.body)
		if len(ls) > opts.MaxLines {
			t.Errorf("request %d: %d lines, over MaxLines %d", i, len(ls), opts.MaxLines)
		}
		if i == 0 {
			continue // answered 429, counted when re-sent
		}
		for _, l := range ls {
			var ok bool
			switch r.path {
			case "/v1/predictions":
				preds++
				_, _, ok = validPrediction(l)
			case "/v1/labels":
				labels++
				_, _, ok = validLabel(l)
			default:
				t.Fatalf("request %d to unexpected path %s", i, r.path)
			}
			if !ok {
				rejected++
			}
		}
	}
	// One simulated day brings about 90 × 24 predictions.
	if preds < 1500 || labels < 500 {
		t.Errorf("%d prediction and %d label lines in a simulated day, want about 2160 and 700", preds, labels)
	}
	if got, want := [2]int{last.Predictions, last.Labels}, [2]int{preds, labels}; got != want {
		t.Errorf("Stats lines (predictions, labels) = %v, receiver got %v", got, want)
	}
	if got, want := last.Accepted+last.Duplicates+last.Rejected, preds+labels; got != want {
		t.Errorf("accepted+duplicates+rejected = %d, want the %d lines sent", got, want)
	}
	if last.Rejected != rejected {
		t.Errorf("Stats.Rejected = %d, receiver rejected %d", last.Rejected, rejected)
	}
	// Malformed lines are rare: about one per thousand predictions.
	if rejected > (preds+labels)/200 {
		t.Errorf("%d of %d lines malformed, want under 0.5%%", rejected, preds+labels)
	}
}

func TestRunStopsWhenContextEnds(t *testing.T) {
	rc := &receiver{}
	srv := httptest.NewServer(rc)
	defer srv.Close()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	opts := Options{Start: time.Now().Add(-time.Hour), Interval: 10 * time.Millisecond}
	done := make(chan error, 1)
	go func() { done <- Run(ctx, opts, srv.URL, nil, func(Stats) { cancel() }) }()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("Run after cancel: %v, want nil", err)
		}
	case <-time.After(30 * time.Second):
		t.Fatalf("Run did not return after its context ended")
	}
}

func TestRunRefusedStatus(t *testing.T) {
	for _, status := range []int{http.StatusUnauthorized, http.StatusRequestEntityTooLarge} {
		t.Run(fmt.Sprint(status), func(t *testing.T) {
			rc := &receiver{status: status}
			srv := httptest.NewServer(rc)
			defer srv.Close()
			ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
			defer cancel()
			opts := Options{Start: time.Now().Add(-2 * day), Speed: 86400, Interval: 10 * time.Millisecond}
			err := Run(ctx, opts, srv.URL, nil, nil)
			if err == nil || !strings.Contains(err.Error(), fmt.Sprint(status)) {
				t.Errorf("Run against %d: error %v, want one naming the status", status, err)
			}
		})
	}
}

func TestRunRejectsBadOptions(t *testing.T) {
	for name, opts := range map[string]Options{
		"no start":       {},
		"negative speed": {Start: testStart, Speed: -1},
	} {
		if err := Run(context.Background(), opts, "http://127.0.0.1:1", nil, nil); err == nil {
			t.Errorf("%s: Run returned nil, want an error", name)
		}
	}
}

func TestRetryAfter(t *testing.T) {
	now := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	for _, c := range []struct {
		v    string
		want time.Duration
	}{
		{"", time.Second},
		{"3", 3 * time.Second},
		{" 2 ", 2 * time.Second},
		{"0", time.Millisecond},
		{"3600", maxRetryAfter},
		{"soon", time.Second},
		// An HTTP date (RFC 9110 §5.6.7, IMF-fixdate) five seconds ahead.
		{"Sun, 01 Mar 2026 12:00:05 GMT", 5 * time.Second},
		{"Sun, 01 Mar 2026 11:00:00 GMT", time.Millisecond},
	} {
		if got := retryAfter(c.v, now); got != c.want {
			t.Errorf("retryAfter(%q) = %v, want %v", c.v, got, c.want)
		}
	}
}
