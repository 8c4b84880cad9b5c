package windows_test

import (
	"context"
	"slices"
	"testing"
	"time"

	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// TestTrackedStore writes random traffic through Tracker.Track on a real
// SQLite store, with no commit hook of its own, and checks that the
// tracker's windows and watermark equal the store's, that its classes are
// in store order, and that a conflicting prediction (not stored) does not
// move the watermark.
func TestTrackedStore(t *testing.T) {
	ctx := context.Background()
	s := sqlitestoretest.Open(t, sqlitestore.Options{})
	tr := newSorterTracker(t, s)
	ts := tr.Track(s)
	tf := newTraffic(t, ts, 11)
	direct := func(txFunc func() (store.Changes, map[string]time.Time, error)) error {
		_, _, err := txFunc()
		return err
	}
	for range 40 {
		tf.batch(t, direct)
	}
	if _, _, err := ts.ApplyLabelTimeout(ctx, tf.model, "intact", time.Hour, tf.at); err != nil {
		t.Fatal(err)
	}
	checkAgainstStore(t, s, tr, tf.model)
	checkWatermark(t, s, tr, tf.model)
	if got := tr.Views(tf.model)[0].Matrix.Classes(); !slices.Equal(got, sorterClasses) {
		t.Errorf("classes %v, want the store's order %v", got, sorterClasses)
	}

	before, _ := tr.Watermark(tf.model)
	later := tf.at.Add(48 * time.Hour)
	conflict := []store.Prediction{{Model: tf.model, ID: tf.prefix + "0", At: later, Bucket: later.Truncate(5 * time.Minute), Predicted: "damaged"}}
	out, err := ts.IngestPredictions(ctx, conflict, later)
	if err != nil {
		t.Fatal(err)
	}
	if out.Outcomes[0] == store.PredictionStored {
		t.Fatalf("a repeated id was stored")
	}
	if after, _ := tr.Watermark(tf.model); !after.Equal(before) {
		t.Errorf("watermark moved from %s to %s on a prediction that was not stored", before, after)
	}
	checkAgainstStore(t, s, tr, tf.model)
}
