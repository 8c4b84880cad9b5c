package collector_test

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"strings"
	"testing"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/collector"
)

func TestAutoRegister(t *testing.T) { eachStore(t, testAutoRegister) }

func testAutoRegister(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) {
		o.AutoRegisterModels = true
		o.MaxModels = 3
		o.Defaults = collector.ModelPolicy{MaxClasses: 2}
	})
	code, r, _ := b.post(t, "/v1/predictions", ndjson, lines(
		`{"model":"ticket-route","id":"t-1","predicted":"refund"}`,
		`{"model":"ticket-route","id":"t-2","predicted":"outage","scores":{"outage":0.7,"spam":0.3}}`,
		`{"model":"ticket-route","id":"t-3","predicted":"refund"}`,
		`{"model":"card-fraud","id":"c-1","predicted":"chargeback"}`,
		`{"model":"claim-triage","id":"k-1","predicted":"fast-track"}`,
		`{"model":"claim-triage","id":"k-2","predicted":"review","scores":{"review":0.6,"reject":0.4}}`,
		`{"model":"Claim Triage","id":"k-3","predicted":"review"}`,
		`{"model":"loan-default","id":"l-1","predicted":"repaid"}`,
	))
	if code != 200 {
		t.Fatalf("status = %d (%+v)", code, r)
	}
	if r.Accepted != 3 {
		t.Errorf("accepted = %d, want 3", r.Accepted)
	}
	// ticket-route holds billing, outage and may add one class (max 3):
	// refund comes first, spam is refused.
	checkRejected(t, r.Rejected, []rejected{
		{2, `class "spam" would pass max_classes (3) of model "ticket-route"`},
		{4, `class "chargeback" is not registered for model "card-fraud"`},
		{6, `would pass max_classes (2) of model "claim-triage"`},
		{7, "may only hold letters"},
		{8, `unknown model "loan-default": registering it would pass max_models (3)`},
	})
	b.mu.Lock()
	defer b.mu.Unlock()
	for model, want := range map[string][]string{
		"ticket-route": {"billing", "outage", "refund"},
		"claim-triage": {"fast-track", "review"},
		"card-fraud":   {"legit", "fraud"},
	} {
		if got := b.registers[model]; !slices.Equal(got, want) {
			t.Errorf("registered classes of %s = %v, want %v", model, got, want)
		}
	}
	for _, m := range []string{"Claim Triage", "loan-default"} {
		if _, ok := b.registers[m]; ok {
			t.Errorf("model %q was registered", m)
		}
	}
}

// TestClassesFromAnotherReplica checks that classes registered by another
// collector on the same database (one with a newer configuration, one
// auto-registering) are picked up on a cache miss.
func TestClassesFromAnotherReplica(t *testing.T) { eachStore(t, testClassesFromAnotherReplica) }

func testClassesFromAnotherReplica(t *testing.T, be backend) {
	b := setup(t, be, nil)
	newer := testModels()
	newer[0].Classes = append(newer[0].Classes, "chargeback")
	other, err := collector.New(collector.Options{Store: b.store, Models: newer, Registerer: prometheus.NewRegistry(), Now: receiveTime})
	if err != nil {
		t.Fatal(err)
	}
	res, err := other.Ingest(context.Background(), collector.Predictions, strings.NewReader(lines(
		`{"model":"ticket-route","id":"t-9","predicted":"refund"}`,
		`{"model":"card-fraud","id":"c-9","predicted":"chargeback"}`,
	)), collector.BatchOptions{})
	if err != nil || res.Accepted != 2 {
		t.Fatalf("other replica: %+v %v", res, err)
	}
	code, r, _ := b.post(t, "/v1/labels", ndjson, lines(
		`{"model":"ticket-route","id":"t-9","actual":"refund"}`,
		`{"model":"card-fraud","id":"c-9","actual":"chargeback"}`,
	))
	if code != 200 || r.Accepted != 2 {
		t.Errorf("labels for the other replica's classes: %d %+v", code, r)
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	for model, want := range map[string][]string{
		"ticket-route": {"billing", "outage", "refund"},
		"card-fraud":   {"legit", "fraud", "chargeback"},
	} {
		if got := b.registers[model]; !slices.Equal(got, want) {
			t.Errorf("registered classes of %s = %v, want %v", model, got, want)
		}
	}
}

func TestIngestFile(t *testing.T) { eachStore(t, testIngestFile) }

func testIngestFile(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) { o.Limits.MaxLineBytes = 200 })
	var sb strings.Builder
	for i := 1; i <= 10; i++ {
		switch i {
		case 4:
			sb.WriteString(`{"model":"card-fraud","id":"f-4","predicted":"maybe"}` + "\n")
		case 6:
			sb.WriteString("\n")
		case 8:
			sb.WriteString(`{"model":"card-fraud","id":"` + strings.Repeat("y", 250) + `","predicted":"legit"}` + "\n")
		default:
			fmt.Fprintf(&sb, `{"model":"card-fraud","id":"f-%d","at":"2026-03-01T10:%02d:00Z","predicted":"legit"}`+"\n", i, i)
		}
	}
	var progress []collector.Progress
	res, err := b.col.Ingest(context.Background(), collector.Predictions, strings.NewReader(sb.String()), collector.BatchOptions{
		BatchLines: 3,
		Progress:   func(p collector.Progress) { progress = append(progress, p) },
	})
	if err != nil {
		t.Fatal(err)
	}
	if res.Accepted != 7 || res.Duplicates != 0 || len(res.Rejected) != 2 {
		t.Errorf("result = %+v", res)
	}
	if len(res.Rejected) == 2 {
		if le := res.Rejected[0]; le.Line != 4 || !strings.Contains(le.Error, `class "maybe"`) {
			t.Errorf("rejected[0] = %+v", le)
		}
		if le := res.Rejected[1]; le.Line != 8 || !strings.Contains(le.Error, "longer than the 200-byte limit") {
			t.Errorf("rejected[1] = %+v", le)
		}
	}
	// Nine non-blank lines in batches of three: lines 1-3, 4-7 (6 is blank), 8-10.
	var ends []int
	for _, p := range progress {
		ends = append(ends, p.Line)
	}
	if want := []int{3, 7, 10}; !slices.Equal(ends, want) {
		t.Errorf("progress lines = %v, want %v", ends, want)
	}
	if got := progress[len(progress)-1]; got.Accepted != 7 || got.Rejected != 2 {
		t.Errorf("last progress = %+v", got)
	}
}

func TestIngestFileStoreFailure(t *testing.T) { eachStore(t, testIngestFileStoreFailure) }

func testIngestFileStoreFailure(t *testing.T, be backend) {
	b := setup(t, be, nil)
	var sb strings.Builder
	for i := 1; i <= 5; i++ {
		fmt.Fprintf(&sb, `{"model":"card-fraud","id":"g-%d","predicted":"legit"}`+"\n", i)
	}
	res, err := b.col.Ingest(context.Background(), collector.Predictions, strings.NewReader(sb.String()), collector.BatchOptions{
		BatchLines: 2,
		Progress:   func(collector.Progress) { b.store.Close() },
	})
	var se *collector.StoreError
	if !errors.As(err, &se) || se.FirstLine != 3 || se.LastLine != 4 {
		t.Fatalf("err = %v, want a store error for lines 3-4", err)
	}
	if res.Accepted != 2 {
		t.Errorf("accepted = %d, want the first batch's 2", res.Accepted)
	}
}

func TestFutureLimit(t *testing.T) { eachStore(t, testFutureLimit) }

func testFutureLimit(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) { o.Limits.MaxFuture = -1 })
	code, r, _ := b.post(t, "/v1/predictions", ndjson, `{"model":"card-fraud","id":"far","predicted":"legit","at":"2030-01-01T00:00:00Z"}`)
	if code != 200 || r.Accepted != 1 {
		t.Errorf("with no future limit: %d %+v", code, r)
	}
	code, r, _ = b.post(t, "/v1/predictions", ndjson, lines(
		`{"model":"card-fraud","id":"far-2","predicted":"legit","at":"2200-01-01T00:00:00Z"}`,
		`{"model":"card-fraud","id":"old","predicted":"legit","at":"1969-12-31T23:59:59Z"}`,
	))
	if code != 400 {
		t.Errorf("times outside the bucket range: status %d", code)
	}
	checkRejected(t, r.Rejected, []rejected{{1, "not in the years 1970 to 2199"}, {2, "not in the years 1970 to 2199"}})
}
