package collector_test

import (
	"context"
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"

	"github.com/classwatch/classwatch/collector"
)

func TestMaintain(t *testing.T) { eachStore(t, testMaintain) }

func testMaintain(t *testing.T, be backend) {
	b := setup(t, be, func(o *collector.Options) {
		o.Models[0].LabelTimeout = 24 * time.Hour
		o.Models[0].DefaultLabel = "legit"
		o.Models[0].EarlyLabelTTL = 48 * time.Hour
		o.Models[0].Retention = 72 * time.Hour
	})
	ctx := context.Background()
	if _, err := b.col.Ingest(ctx, collector.Predictions, strings.NewReader(lines(
		`{"model":"card-fraud","id":"a","at":"2026-03-01T12:00:00Z","predicted":"fraud"}`,
		`{"model":"card-fraud","id":"b","at":"2026-03-01T12:05:00Z","predicted":"fraud"}`,
	)), collector.BatchOptions{}); err != nil {
		t.Fatal(err)
	}
	// b gets a real label; "ghost" waits as an early label, received at
	// the collector's clock, 2026-03-01T12:30Z.
	if _, err := b.col.Ingest(ctx, collector.Labels, strings.NewReader(lines(
		`{"model":"card-fraud","id":"b","actual":"fraud","at":"2026-03-01T12:20:00Z"}`,
		`{"model":"card-fraud","id":"ghost","actual":"fraud","at":"2026-03-01T12:20:00Z"}`,
	)), collector.BatchOptions{}); err != nil {
		t.Fatal(err)
	}
	b.mu.Lock()
	b.commits = nil
	b.mu.Unlock()

	day := func(d int, hms string) time.Time {
		tm, err := time.Parse(time.RFC3339, fmt.Sprintf("2026-03-%02dT%sZ", d, hms))
		if err != nil {
			t.Fatal(err)
		}
		return tm
	}
	steps := []struct {
		now                      time.Time
		implied, expired, purged float64
		cells                    string
	}{
		// a's label timeout ends at 03-02T12:00.
		{day(2, "11:59:59"), 0, 0, 0, "map[fraud/fraud:1]"},
		{day(2, "12:00:00"), 1, 0, 0, "map[fraud/fraud:1 legit/fraud:1]"},
		// ghost was received 03-01T12:30 and lives 48h.
		{day(3, "12:29:59"), 1, 0, 0, "map[fraud/fraud:1 legit/fraud:1]"},
		{day(3, "12:30:00"), 1, 1, 0, "map[fraud/fraud:1 legit/fraud:1]"},
		// Retention 72h: the bucket [12:00, 12:05) goes once now−72h
		// reaches 12:05, the next one at 12:10; cells stay.
		{day(4, "12:04:59"), 1, 1, 0, "map[fraud/fraud:1 legit/fraud:1]"},
		{day(4, "12:05:00"), 1, 1, 1, "map[fraud/fraud:1 legit/fraud:1]"},
		{day(4, "12:10:00"), 1, 1, 2, "map[fraud/fraud:1 legit/fraud:1]"},
	}
	for _, s := range steps {
		if err := b.col.Maintain(ctx, s.now); err != nil {
			t.Fatalf("maintain at %v: %v", s.now, err)
		}
		if got := testutil.ToFloat64(metric(t, b, "classwatch_labels_received_total", "card-fraud", "implied")); got != s.implied {
			t.Errorf("at %v: implied = %v, want %v", s.now, got, s.implied)
		}
		if got := testutil.ToFloat64(metric(t, b, "classwatch_labels_received_total", "card-fraud", "expired")); got != s.expired {
			t.Errorf("at %v: expired = %v, want %v", s.now, got, s.expired)
		}
		if got := testutil.ToFloat64(metric(t, b, "classwatch_collector_purged_predictions_total", "card-fraud")); got != s.purged {
			t.Errorf("at %v: purged = %v, want %v", s.now, got, s.purged)
		}
		if got := fmt.Sprint(b.cells(t, "card-fraud")); got != s.cells {
			t.Errorf("at %v: cells = %s, want %s", s.now, got, s.cells)
		}
		if got, want := testutil.ToFloat64(metric(t, b, "classwatch_collector_maintenance_last_success_timestamp_seconds")), float64(s.now.Unix()); got != want {
			t.Errorf("at %v: last success = %v, want %v", s.now, got, want)
		}
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	if len(b.commits) != 1 {
		t.Fatalf("commits that changed counts = %d, want 1 (the implied label)", len(b.commits))
	}
	ch := b.commits[0].changes
	if len(ch.Cells) != 1 || ch.Cells[0].Actual != "legit" || ch.Cells[0].Predicted != "fraud" || ch.Cells[0].N != 1 {
		t.Errorf("implied label changes = %+v", ch.Cells)
	}
}

// TestMaintainFailure checks that a closed store makes Maintain fail and
// leaves the success timestamp alone.
func TestMaintainFailure(t *testing.T) { eachStore(t, testMaintainFailure) }

func testMaintainFailure(t *testing.T, be backend) {
	b := setup(t, be, nil)
	b.store.Close()
	if err := b.col.Maintain(context.Background(), receiveTime()); err == nil {
		t.Fatal("Maintain on a closed store succeeded")
	}
	if got := testutil.ToFloat64(metric(t, b, "classwatch_collector_maintenance_last_success_timestamp_seconds")); got != 0 {
		t.Errorf("last success = %v, want 0", got)
	}
}
