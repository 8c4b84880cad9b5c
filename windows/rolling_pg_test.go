package windows_test

import (
	"context"
	"testing"

	"github.com/classwatch/classwatch/windows"
	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgstore/pgstoretest"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// TestTrackerReplicasOnPostgres runs two daemons' worth of ingest into one
// PostgreSQL schema, each replica applying only its own commits to its own
// tracker: after Refresh both trackers hold the windows of all traffic.
func TestTrackerReplicasOnPostgres(t *testing.T) {
	ctx := context.Background()
	url := pgtest.URL(t)
	storeA, storeB := pgstoretest.Open(t, url), pgstoretest.Open(t, url)
	trA, trB := newSorterTracker(t, storeA), newSorterTracker(t, storeB)
	tfA, tfB := newTraffic(t, storeA, 11), newTraffic(t, storeB, 12)
	tfA.prefix, tfB.prefix = "east-", "west-"
	for _, tr := range []*windows.Tracker{trA, trB} {
		tr.SetClasses("parcel-sorter", sorterClasses)
	}
	for range 25 {
		tfA.batch(t, trA.Commit)
		tfB.batch(t, trB.Commit)
	}
	// Before Refresh, replica A does not know B's traffic.
	v, _ := trA.View("parcel-sorter", "3h")
	c, err := storeA.Counts(ctx, store.Query{Model: "parcel-sorter", From: v.From, To: v.To})
	if err != nil {
		t.Fatal(err)
	}
	all, _, err := windows.FromCounts(sorterClasses, c)
	if err != nil {
		t.Fatal(err)
	}
	if v.Matrix.Total() >= all.Total() {
		t.Fatalf("replica A counts %d labeled in 3h before Refresh, the store %d: the scenario shows nothing", v.Matrix.Total(), all.Total())
	}
	for _, tr := range []*windows.Tracker{trA, trB} {
		if err := tr.Refresh(ctx); err != nil {
			t.Fatal(err)
		}
		checkAgainstStore(t, storeA, tr, "parcel-sorter")
	}
	sameViews(t, trA, trB, "parcel-sorter")
}
