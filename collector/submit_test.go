package collector_test

import (
	"context"
	"errors"
	"fmt"
	"net/http"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows/store"
)

func TestSubmitFormats(t *testing.T) { eachStore(t, testSubmitFormats) }

// testSubmitFormats sends the same kind of body in each format FormatAuto
// detects and checks body-relative line numbers and the source counter.
func testSubmitFormats(t *testing.T, be backend) {
	b := setup(t, be, nil)
	ctx := context.Background()
	cases := []struct {
		name, body   string
		accepted     int
		rejectedLine int
	}{
		{"ndjson", lines(
			`{"model":"card-fraud","id":"n1","predicted":"legit"}`,
			``,
			`{"model":"card-fraud","id":"n2","predicted":"chargeback"}`,
		), 1, 3},
		{"array", `[{"model":"card-fraud","id":"a1","predicted":"chargeback"},
			{"model":"card-fraud","id":"a2","predicted":"fraud"}]`, 1, 1},
		{"object over lines", "{\n\"model\": \"card-fraud\",\n\"id\": \"o1\",\n\"predicted\": \"x y\"\n}\n", 0, 1},
		{"ndjson with a broken line", lines(`x`, `{"model":"card-fraud","id":"b1","predicted":"fraud"}`), 1, 1},
	}
	for _, tc := range cases {
		res, err := b.col.Submit(ctx, collector.Predictions, strings.NewReader(tc.body), collector.SubmitOptions{Source: "nats"})
		if err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		if res.Accepted != tc.accepted || len(res.Rejected) != 1 || res.Rejected[0].Line != tc.rejectedLine {
			t.Errorf("%s: %+v, want %d accepted and line %d rejected", tc.name, res, tc.accepted, tc.rejectedLine)
		}
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_source_lines_total", "predictions", "accepted", "nats")); got != 3 {
		t.Errorf("nats accepted lines = %v, want 3", got)
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_source_lines_total", "predictions", "rejected", "nats")); got != 4 {
		t.Errorf("nats rejected lines = %v, want 4", got)
	}
	res, err := b.col.Submit(ctx, collector.Labels, strings.NewReader(`{"model":"card-fraud","id":"n1","actual":"fraud"}`), collector.SubmitOptions{Source: "nats"})
	if err != nil || res.Accepted != 1 {
		t.Errorf("label: %+v, %v", res, err)
	}
	if _, err := b.col.Submit(ctx, collector.Kind(7), strings.NewReader(`{}`), collector.SubmitOptions{}); err == nil {
		t.Error("an unknown kind was taken")
	}
}

func TestSubmitRefusals(t *testing.T) { eachStore(t, testSubmitRefusals) }

// testSubmitRefusals checks the errors a body as a whole can get.
func testSubmitRefusals(t *testing.T, be backend) {
	entered := make(chan struct{}, 1)
	gate := make(chan struct{})
	var hold atomic.Bool
	b := setup(t, be, func(o *collector.Options) {
		o.Limits.MaxInFlight = 1
		o.Limits.QueueWait = 20 * time.Millisecond
		o.Limits.MaxBodyBytes = 4096
		o.Store = pausingStore{Store: o.Store, pause: func() {
			if hold.Load() {
				entered <- struct{}{}
				<-gate
			}
		}}
	})
	ctx := context.Background()
	line := `{"model":"card-fraud","id":"big","predicted":"legit"}` + "\n"
	_, err := b.col.Submit(ctx, collector.Predictions, strings.NewReader(strings.Repeat(line, 100)), collector.SubmitOptions{})
	var tl *collector.TooLargeError
	if !errors.As(err, &tl) || tl.Limit != 4096 {
		t.Errorf("body over the limit: %v, want *TooLargeError", err)
	}
	if _, err := b.col.Submit(ctx, collector.Predictions, strings.NewReader(`[{"model":`), collector.SubmitOptions{}); !errors.As(err, new(*collector.BodyError)) {
		t.Errorf("cut JSON array: %v, want *BodyError", err)
	}

	hold.Store(true)
	done := make(chan error, 1)
	go func() {
		_, err := b.col.Submit(ctx, collector.Predictions, strings.NewReader(`{"model":"card-fraud","id":"slow","predicted":"legit"}`), collector.SubmitOptions{})
		done <- err
	}()
	<-entered
	if _, err := b.col.Submit(ctx, collector.Predictions, strings.NewReader(`{"model":"card-fraud","id":"q","predicted":"legit"}`), collector.SubmitOptions{}); !errors.Is(err, collector.ErrBusy) {
		t.Errorf("second body while the slot is taken: %v, want ErrBusy", err)
	}
	close(gate)
	if err := <-done; err != nil {
		t.Errorf("first body: %v", err)
	}
	hold.Store(false)

	b.store.Close()
	_, err = b.col.Submit(ctx, collector.Labels, strings.NewReader(`{"model":"card-fraud","id":"slow","actual":"legit"}`), collector.SubmitOptions{})
	var se *collector.StoreError
	if !errors.As(err, &se) || !errors.Is(err, store.ErrUnavailable) || se.FirstLine != 1 || se.LastLine != 1 {
		t.Errorf("closed store: %v, want *StoreError of line 1 wrapping store.ErrUnavailable", err)
	}
}

func TestRejectedOmitted(t *testing.T) { eachStore(t, testRejectedOmitted) }

// testRejectedOmitted checks that a response lists at most
// MaxListedRejections rejected lines and counts the rest.
func testRejectedOmitted(t *testing.T, be backend) {
	b := setup(t, be, nil)
	var sb strings.Builder
	const bad = collector.MaxListedRejections + 500
	for range bad {
		sb.WriteString("x\n")
	}
	fmt.Fprintln(&sb, `{"model":"card-fraud","id":"good","predicted":"legit"}`)
	code, r, _ := b.post(t, "/v1/predictions", ndjson, sb.String())
	if code != http.StatusOK || r.Accepted != 1 || len(r.Rejected) != collector.MaxListedRejections || r.RejectedOmitted != 500 {
		t.Fatalf("got %d: accepted %d, %d listed, %d omitted; want 200, 1, %d, 500",
			code, r.Accepted, len(r.Rejected), r.RejectedOmitted, collector.MaxListedRejections)
	}
	if last := r.Rejected[len(r.Rejected)-1].Line; last != collector.MaxListedRejections {
		t.Errorf("last listed line = %d, want the first %d lines listed", last, collector.MaxListedRejections)
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_source_lines_total", "predictions", "rejected", "http")); got != bad {
		t.Errorf("http rejected lines = %v, want %d", got, bad)
	}
}
