package collector_test

import (
	"bufio"
	"fmt"
	"net"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/classwatch/classwatch/collector"
)

// stall opens a connection that sends a request's headers and the first
// part of a body of declared length n, then nothing more.
func stall(tb testing.TB, b *bundle, n int) (net.Conn, *bufio.Reader) {
	tb.Helper()
	conn, err := net.Dial("tcp", strings.TrimPrefix(b.srv.URL, "http://"))
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { conn.Close() })
	fmt.Fprintf(conn, "POST /v1/predictions HTTP/1.1\r\nHost: x\r\nContent-Type: application/x-ndjson\r\nContent-Length: %d\r\n\r\n{\"model\":", n)
	return conn, bufio.NewReader(conn)
}

// readStatus reads the status of the response on a stalled connection.
func readStatus(tb testing.TB, conn net.Conn, br *bufio.Reader) (int, http.Header, bool) {
	tb.Helper()
	_ = conn.SetReadDeadline(time.Now().Add(10 * time.Second))
	resp, err := http.ReadResponse(br, nil)
	if err != nil {
		tb.Fatalf("read response of the stalled body: %v", err)
	}
	resp.Body.Close()
	return resp.StatusCode, resp.Header, resp.Close
}

func TestSlowSenders(t *testing.T) { eachStore(t, testSlowSenders) }

// testSlowSenders checks that bodies still arriving hold no in-flight slot
// (before, four senders at 1 byte/s starved every batch with 503), and
// that a body slower than the minimum rate is answered 408.
func testSlowSenders(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) {
		o.Limits.MaxInFlight = 1
		o.Limits.QueueWait = 100 * time.Millisecond
		o.Limits.BodyGrace = 500 * time.Millisecond
		o.Limits.MinBodyRate = 1000
	})
	type conn struct {
		c  net.Conn
		br *bufio.Reader
	}
	var slow []conn
	for range 4 {
		c, br := stall(t, b, 10000)
		slow = append(slow, conn{c, br})
	}
	time.Sleep(100 * time.Millisecond) // the stalled bodies are being read
	code, r, _ := b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"on-time","predicted":"legit"}`)
	if code != http.StatusOK || r.Accepted != 1 {
		t.Errorf("a batch beside four stalled senders: %d %+v, want 200", code, r)
	}
	for _, s := range slow {
		if code, _, closed := readStatus(t, s.c, s.br); code != http.StatusRequestTimeout || !closed {
			t.Errorf("stalled body: %d (connection closed %v), want 408 and a closed connection", code, closed)
		}
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_collector_body_refusals_total", "predictions", "stalled")); got != 4 {
		t.Errorf("stalled bodies counted = %v, want 4", got)
	}
}

func TestCutBodies(t *testing.T) { eachStore(t, testCutBodies) }

// testCutBodies checks that CutBodies answers a body being read at once
// and refuses later ones before reading them.
func testCutBodies(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) {
		o.Limits.BodyGrace = time.Minute
	})
	c, br := stall(t, b, 10000)
	time.Sleep(100 * time.Millisecond)
	start := time.Now()
	b.col.CutBodies()
	code, h, closed := readStatus(t, c, br)
	if code != http.StatusServiceUnavailable || h.Get("Retry-After") == "" || !closed {
		t.Errorf("body being read at the cut: %d %v, want 503 with Retry-After and a closed connection", code, h)
	}
	if d := time.Since(start); d > 5*time.Second {
		t.Errorf("the cut body was answered after %s; want at once, not after the grace", d)
	}
	if code, _, _ := b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"late","predicted":"legit"}`); code != http.StatusServiceUnavailable {
		t.Errorf("a request after the cut: %d, want 503", code)
	}
}

// TestBufferedBytes checks that bodies held in memory are capped by
// Limits.MaxBufferedBytes.
func TestBufferedBytes(t *testing.T) {
	b := setup(t, sqliteBackend(), func(o *collector.Options) {
		o.Limits.MaxBufferedBytes = 64 << 10
		o.Limits.BodyGrace = time.Minute
	})
	c, br := stall(t, b, 60<<10) // holds 60 KiB + 1 of the budget
	time.Sleep(100 * time.Millisecond)
	body := strings.Repeat(`{"model":"card-fraud","id":"x","predicted":"legit"}`+"\n", 200)
	if code, r, _ := b.post(t, "/v1/predictions", ndjson, body); code != http.StatusServiceUnavailable {
		t.Errorf("a body past the budget: %d %+v, want 503", code, r)
	}
	c.Close()
	_ = br
	time.Sleep(100 * time.Millisecond) // the stalled read ends and gives its bytes back
	if code, r, _ := b.post(t, "/v1/predictions", ndjson, body); code != http.StatusOK {
		t.Errorf("the same body once the budget freed: %d %+v, want 200", code, r)
	}
}
