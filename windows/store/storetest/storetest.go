// Package storetest is the conformance suite of the store.Store seam. Each
// backend calls Exercise from its own tests, so both backends are held to
// the one set of semantics documented in package store.
//
// The suite checks explicit values worked out by hand for every row of the
// join's semantics, and compares random histories against an in-memory
// reference model (reference.go) written straight from store's
// documentation. Where store's documentation leaves a choice open, the
// suite fixes it, and the choice is stated beside the check:
//
//   - a repeat of an early label version still waiting is LabelDuplicate;
//   - a real label equal to an implied one is LabelDuplicate (the current
//     label's class is unchanged, no cell moves); a different one is
//     LabelCorrected;
//   - Counts and CountsAsOf leave out zero counts, order cells by bucket,
//     actual, predicted and predicted counts by bucket, predicted (byte
//     order of the names);
//   - CountsAsOf leaves out predictions whose at is after asOf;
//   - Changes list each cell or predicted count at most once, never with a
//     zero N, in any order;
//   - ingest, reads and maintenance of an unregistered model fail with
//     store.ErrUnknownModel and keep nothing;
//   - after PurgeRaw, Models counts only the predictions still stored,
//     Verify skips the purged buckets, and a label for a purged prediction
//     waits as an early label.
//
// All times are whole seconds in UTC, well inside any backend's precision.
package storetest

import (
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// Exercise runs the conformance suite. newStore must return a fresh,
// migrated, empty store for each call (its own file or schema) and arrange
// its cleanup with t.Cleanup.
func Exercise(t *testing.T, newStore func(t *testing.T) store.Store) {
	t.Run("MigrateAndPing", func(t *testing.T) { testMigrateAndPing(t, newStore(t)) })
	t.Run("EnsureModel", func(t *testing.T) { testEnsureModel(t, newStore(t)) })
	t.Run("UnknownModel", func(t *testing.T) { testUnknownModel(t, newStore(t)) })
	t.Run("Predictions", func(t *testing.T) { testPredictions(t, newStore(t)) })
	t.Run("Labels", func(t *testing.T) { testLabels(t, newStore(t)) })
	t.Run("EarlyLabels", func(t *testing.T) { testEarlyLabels(t, newStore(t)) })
	t.Run("EarlyLabelExpiry", func(t *testing.T) { testEarlyLabelExpiry(t, newStore(t)) })
	t.Run("LabelTimeout", func(t *testing.T) { testLabelTimeout(t, newStore(t)) })
	t.Run("SegmentsAndRanges", func(t *testing.T) { testSegmentsAndRanges(t, newStore(t)) })
	t.Run("PurgeRaw", func(t *testing.T) { testPurgeRaw(t, newStore(t)) })
	t.Run("Alerts", func(t *testing.T) { testAlerts(t, newStore(t)) })
	t.Run("TryLead", func(t *testing.T) { testTryLead(t, newStore(t)) })
	t.Run("Snapshot", func(t *testing.T) { testSnapshot(t, newStore(t)) })
	t.Run("ConcurrentIngest", func(t *testing.T) { testConcurrentIngest(t, newStore(t)) })
	t.Run("ConcurrentJoin", func(t *testing.T) { testConcurrentJoin(t, newStore(t)) })
	t.Run("ConcurrentLabels", func(t *testing.T) { testConcurrentLabels(t, newStore(t)) })
	t.Run("Scores", func(t *testing.T) { testScores(t, newStore(t)) })
	t.Run("OrderIndependence", func(t *testing.T) { testOrderIndependence(t, newStore) })
	t.Run("ReferenceHistory", func(t *testing.T) { testReferenceHistory(t, newStore) })
	t.Run("Events", func(t *testing.T) { testEvents(t, newStore) })
	t.Run("LabelDelays", func(t *testing.T) { testLabelDelays(t, newStore(t)) })
}

// bucketWidth is the bucket every test uses (the configured default).
const bucketWidth = 5 * time.Minute

// The two fictional models of the suite: a card-fraud screen of a small
// bank and a support desk's ticket router.
const (
	fraudModel  = "card-fraud"
	ticketModel = "ticket-router"
)

// base is the suite's time origin.
func base() time.Time { return time.Date(2026, 3, 2, 9, 0, 0, 0, time.UTC) }

// at returns base + d.
func at(d time.Duration) time.Time { return base().Add(d) }

// farFuture is an as-of time after every event of the suite.
func farFuture() time.Time { return time.Date(2100, 1, 1, 0, 0, 0, 0, time.UTC) }

func pred(model, id string, when time.Time, predicted, segment string) store.Prediction {
	return store.Prediction{Model: model, ID: id, At: when, Bucket: when.Truncate(bucketWidth), Predicted: predicted, Segment: segment}
}

func lab(model, id, actual string, when time.Time) store.Label {
	return store.Label{Model: model, ID: id, Actual: actual, At: when}
}

func cell(bucket time.Time, actual, predicted string, n int64) store.Cell {
	return store.Cell{Bucket: bucket, Actual: actual, Predicted: predicted, N: n}
}

func predicted(bucket time.Time, class string, n int64) store.PredictedCount {
	return store.PredictedCount{Bucket: bucket, Predicted: class, N: n}
}

func cellDelta(model string, bucket time.Time, actual, predicted string, n int64) store.CellDelta {
	return store.CellDelta{Model: model, Bucket: bucket, Actual: actual, Predicted: predicted, N: n}
}

func predDelta(model string, bucket time.Time, class string, n int64) store.PredictedDelta {
	return store.PredictedDelta{Model: model, Bucket: bucket, Predicted: class, N: n}
}

// all selects every bucket of model.
func all(model string) store.Query {
	return store.Query{Model: model, From: time.Date(2000, 1, 1, 0, 0, 0, 0, time.UTC), To: farFuture()}
}
