package alerts

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"
)

var update = flag.Bool("update", false, "rewrite golden files in testdata")

// sampleAlert is a firing alert with fixed figures, as a floor rule makes it.
func sampleAlert(tb testing.TB) Alert {
	tb.Helper()
	r, errs := compile(floorRule(1, 1).withDefaults())
	if len(errs) > 0 {
		tb.Fatal(errs)
	}
	from, to := dayWindow.Bounds(t0)
	a := Alert{
		Key: floorKey, Rule: r.Name, Kind: r.Kind, Model: "card-fraud", Class: "fraud", Window: "1d",
		Metric: "recall", Severity: r.Severity, State: StateFiring,
		Labels:   r.labels("card-fraud", "fraud", ""),
		ActiveAt: t0, StartsAt: t0, EvaluatedAt: t0,
		Result: Result{
			Outcome: OutcomeMet, From: from, To: to, Value: ptr(0.4), Count: 100,
			Interval: &[2]float64{0.3094013, 0.4979974}, Threshold: ptr(0.8), Confidence: 0.95,
		},
		GeneratorURL: generatorURL("http://classwatch.test:9640", "card-fraud"),
	}
	r.annotate(&a)
	return a
}

// TestWebhookPayload compares the webhook body with the golden file
// testdata/webhook_v1.json (go test -run TestWebhookPayload -update
// rewrites it): the version 1 payload is a contract with receivers.
func TestWebhookPayload(t *testing.T) {
	var got []byte
	var auth string
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		got, _ = io.ReadAll(r.Body)
		auth = r.Header.Get("Authorization")
	}))
	defer srv.Close()
	n, err := NotifierConfig{Name: "hook", Type: TypeWebhook, URL: Secret(srv.URL), BearerToken: "t0ken"}.withDefaults().build(srv.Client(), func() time.Time { return t0.Add(5 * time.Second) })
	if err != nil {
		t.Fatal(err)
	}
	if _, err := n.Notify(context.Background(), sampleAlert(t)); err != nil {
		t.Fatalf("Notify: %v", err)
	}
	if auth != "Bearer t0ken" {
		t.Errorf("Authorization %q, want the bearer token", auth)
	}
	var pretty bytes.Buffer
	if err := json.Indent(&pretty, got, "", "  "); err != nil {
		t.Fatalf("payload is not JSON: %v", err)
	}
	pretty.WriteByte('\n')
	const path = "testdata/webhook_v1.json"
	if *update {
		if err := os.WriteFile(path, pretty.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(pretty.Bytes(), want) {
		t.Errorf("payload differs from %s:\n%s", path, pretty.Bytes())
	}
}

// sink is a receiver answering with the codes given, one per request,
// then 200.
type sink struct {
	srv   *httptest.Server
	calls atomic.Int32
	seen  chan struct{}
}

func newSink(tb testing.TB, codes ...int) *sink {
	tb.Helper()
	s := &sink{seen: make(chan struct{}, 100)}
	s.srv = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		i := int(s.calls.Add(1)) - 1
		defer func() { s.seen <- struct{}{} }()
		if i < len(codes) {
			w.WriteHeader(codes[i])
			_, _ = w.Write([]byte("receiver says no"))
		}
	}))
	tb.Cleanup(s.srv.Close)
	return s
}

// notifyOnce starts a manager with one notifier, queues alert a, and
// waits until the queue is empty and the delivery settled.
func notifyOnce(tb testing.TB, cfg NotifierConfig) *Manager {
	tb.Helper()
	b := setup(tb)
	opts := b.options()
	opts.Notifiers = []NotifierConfig{cfg}
	m := b.manager(tb, opts)
	start(tb, m)
	m.delivery.queues[0].push(queued{alert: sampleAlert(tb)})
	stop(tb, m) // Stop delivers what the queue holds
	return m
}

func TestNotifyRetries(t *testing.T) {
	t.Run("5xx is retried", func(t *testing.T) {
		s := newSink(t, 503, 502)
		m := notifyOnce(t, NotifierConfig{Name: "hook", Type: TypeWebhook, URL: Secret(s.srv.URL), MaxAttempts: 3, RetryWait: time.Millisecond})
		if got := s.calls.Load(); got != 3 {
			t.Errorf("%d requests, want 3", got)
		}
		if got := testutil.ToFloat64(m.metrics.sent.WithLabelValues("hook")); got != 1 {
			t.Errorf("sent = %g, want 1", got)
		}
	})
	t.Run("4xx is not retried", func(t *testing.T) {
		s := newSink(t, 400)
		m := notifyOnce(t, NotifierConfig{Name: "hook", Type: TypeWebhook, URL: Secret(s.srv.URL), MaxAttempts: 3, RetryWait: time.Millisecond})
		if got := s.calls.Load(); got != 1 {
			t.Errorf("%d requests, want 1", got)
		}
		if got := testutil.ToFloat64(m.metrics.failed.WithLabelValues("hook")); got != 1 {
			t.Errorf("failed = %g, want 1", got)
		}
		if len(m.delivery.dead) != 1 || !strings.Contains(m.delivery.dead[0].Error, "400 Bad Request") || m.delivery.dead[0].Alerts[0] != floorKey {
			t.Errorf("undelivered = %+v, want the alert with the 400", m.delivery.dead)
		}
	})
	t.Run("gives up after max_attempts", func(t *testing.T) {
		s := newSink(t, 500, 500, 500, 500)
		m := notifyOnce(t, NotifierConfig{Name: "hook", Type: TypeWebhook, URL: Secret(s.srv.URL), MaxAttempts: 2, RetryWait: time.Millisecond})
		if got := s.calls.Load(); got != 2 {
			t.Errorf("%d requests, want 2", got)
		}
		if len(m.delivery.dead) != 1 || !strings.Contains(m.delivery.dead[0].Error, "after 2 attempt(s)") {
			t.Errorf("undelivered = %+v", m.delivery.dead)
		}
	})
	t.Run("each attempt has its own timeout", func(t *testing.T) {
		release := make(chan struct{})
		var calls atomic.Int32
		srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
			calls.Add(1)
			select {
			case <-r.Context().Done():
			case <-release:
			}
		}))
		defer srv.Close()
		defer close(release)
		m := notifyOnce(t, NotifierConfig{Name: "hook", Type: TypeWebhook, URL: Secret(srv.URL), Timeout: 50 * time.Millisecond, MaxAttempts: 2, RetryWait: time.Millisecond})
		if got := calls.Load(); got != 2 {
			t.Errorf("%d requests, want 2", got)
		}
		if len(m.delivery.dead) != 1 || !strings.Contains(m.delivery.dead[0].Error, "attempt timed out after 50ms") {
			t.Errorf("undelivered = %+v, want a timeout", m.delivery.dead)
		}
	})
}

// TestNotifyRedacts: neither the URL's path, query and credentials nor the
// token appear in errors, whether the receiver is down or answers with
// them.
func TestNotifyRedacts(t *testing.T) {
	secrets := []string{"s3cretpath", "qt0ken", "hunter2", "b3arer"}
	echo := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.WriteHeader(500)
		_, _ = w.Write([]byte("bad token " + strings.TrimPrefix(r.Header.Get("Authorization"), "Bearer ") + " for " + r.URL.String()))
	}))
	defer echo.Close()
	down := httptest.NewServer(http.NotFoundHandler())
	down.Close()
	for name, base := range map[string]string{"answer": echo.URL, "network": down.URL} {
		t.Run(name, func(t *testing.T) {
			u := strings.Replace(base, "http://", "http://ops:hunter2@", 1) + "/hooks/s3cretpath?token=qt0ken"
			m := notifyOnce(t, NotifierConfig{Name: "hook", Type: TypeWebhook, URL: Secret(u), BearerToken: "b3arer", MaxAttempts: 1})
			if len(m.delivery.dead) != 1 {
				t.Fatalf("undelivered = %+v, want one", m.delivery.dead)
			}
			msg := m.delivery.dead[0].Error
			for _, s := range secrets {
				if strings.Contains(msg, s) {
					t.Errorf("error %q reveals %q", msg, s)
				}
			}
			if !strings.Contains(msg, "notifier hook") {
				t.Errorf("error %q does not name the notifier", msg)
			}
		})
	}
}

// TestQueueDropsOldest: a full queue drops its oldest alerts and counts
// them, and pushing never waits for the receiver.
func TestQueueDropsOldest(t *testing.T) {
	b := setup(t)
	opts := b.options()
	opts.Notifiers = []NotifierConfig{{Name: "hook", Type: TypeWebhook, URL: "http://127.0.0.1:9/", QueueSize: 2}}
	m := b.manager(t, opts) // not started: nothing drains the queue
	q := m.delivery.queues[0]
	for i := range 5 {
		a := sampleAlert(t)
		a.Key = string(rune('a' + i))
		q.push(queued{alert: a})
	}
	if got := testutil.ToFloat64(m.metrics.dropped.WithLabelValues("hook")); got != 3 {
		t.Errorf("dropped = %g, want 3", got)
	}
	batch := q.take()
	if len(batch) != 2 || batch[0].alert.Key != "d" || batch[1].alert.Key != "e" {
		t.Errorf("queue keeps %v, want the newest two (d, e)", batch)
	}
}
