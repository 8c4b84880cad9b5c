package pgstore

import (
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// partitionCount returns how many day partitions label_versions has.
func partitionCount(t *testing.T, s *Store) int {
	t.Helper()
	var n int
	if err := s.pool.QueryRow(t.Context(),
		`SELECT count(*) FROM pg_inherits WHERE inhparent = 'label_versions'::regclass`).Scan(&n); err != nil {
		t.Fatal(err)
	}
	return n
}

// TestFarPastDays checks the partition limits of the package documentation
// ("Retention"): predictions spread over many far-past days create no
// partition; a label batch needing more than maxBatchDays new partitions
// is refused with store.ErrLimit (not store.ErrUnavailable, which callers
// retry) and keeps nothing; a batch within the limit proceeds, its
// partitions made maxNewDays per transaction; the label timeout creates at
// most maxNewDays per call; and PurgeRaw drops every partition, dropChunk
// per transaction.
func TestFarPastDays(t *testing.T) {
	s := newStore(t)
	ctx := t.Context()
	if _, err := s.EnsureModel(ctx, "card-fraud", []string{"legit", "fraud"}, 0); err != nil {
		t.Fatal(err)
	}
	const days = maxBatchDays + 2*maxNewDays + 5
	start := time.Date(1970, 1, 2, 12, 0, 0, 0, time.UTC)
	var (
		preds  []store.Prediction
		labels []store.Label
	)
	for d := range days {
		at := start.Add(time.Duration(d) * 24 * time.Hour)
		id := fmt.Sprintf("old-%03d", d)
		preds = append(preds, store.Prediction{Model: "card-fraud", ID: id, At: at, Bucket: at, Predicted: "legit"})
		labels = append(labels, store.Label{Model: "card-fraud", ID: id, Actual: "fraud", At: at.Add(time.Hour)})
	}
	now := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)
	if _, err := s.IngestPredictions(ctx, preds, now); err != nil {
		t.Fatal(err)
	}
	if n := partitionCount(t, s); n != 0 {
		t.Errorf("after predictions over %d days: %d partitions, want 0 (none is written to)", days, n)
	}
	_, err := s.IngestLabels(ctx, labels[:maxBatchDays+1], now)
	if !errors.Is(err, store.ErrLimit) || errors.Is(err, store.ErrUnavailable) {
		t.Fatalf("labels over %d new days: err %v, want store.ErrLimit", maxBatchDays+1, err)
	}
	if n := partitionCount(t, s); n != 0 {
		t.Errorf("after the refused batch: %d partitions, want 0", n)
	}
	res, err := s.IngestLabels(ctx, labels[:maxBatchDays], now)
	if err != nil {
		t.Fatalf("labels over %d new days: %v", maxBatchDays, err)
	}
	if res.Outcomes[0] != store.LabelMatched || partitionCount(t, s) != maxBatchDays {
		t.Errorf("labels over %d days: outcome %v, %d partitions; want matched, %d", maxBatchDays, res.Outcomes[0], partitionCount(t, s), maxBatchDays)
	}
	// The label timeout labels the rest, maxNewDays new days per call.
	for call, want := range []int64{maxNewDays, maxNewDays, days - maxBatchDays - 2*maxNewDays, 0} {
		n, _, err := s.ApplyLabelTimeout(ctx, "card-fraud", "legit", time.Hour, now)
		if err != nil || n != want {
			t.Fatalf("ApplyLabelTimeout call %d: %d, %v; want %d", call+1, n, err, want)
		}
	}
	if n := partitionCount(t, s); n != days {
		t.Errorf("after the timeouts: %d partitions, want %d", n, days)
	}
	if diffs, err := s.Verify(ctx); err != nil || len(diffs) > 0 {
		t.Fatalf("Verify: %v, %v", diffs, err)
	}
	if _, err := s.PurgeRaw(ctx, "card-fraud", now); err != nil {
		t.Fatal(err)
	}
	if n := partitionCount(t, s); n != 0 {
		t.Errorf("after PurgeRaw: %d partitions, want 0", n)
	}
}
